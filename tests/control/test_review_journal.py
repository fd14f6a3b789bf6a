"""REVIEW: what the journal says after a disarm that follows unjournaled motion (a procedure's fast
steps), checked against what the board holds and what a restarted daemon then does."""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Callable
from typing import Any

import pytest

import meshwarden.motion as motion
from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import Config
from meshwarden.errors import StoppedRefused
from meshwarden.guard import RampPlan, plan_ramp
from meshwarden.writelog import check_board_log
from tests.control.conftest import run

Bench = Callable[..., tuple[Config, str]]


def test_disarm_journals_zero_for_an_output_a_procedure_had_already_lowered(make_bench: Bench) -> None:
    """c0 is set to 30 V (journaled), a procedure's claim lowers it to 0 V without journaling (its
    fast steps), then a disarm: the journal's last target of c0 must be 0 like the board, so a
    restarted daemon adopts the board instead of waiting to restore c0 to 30 V after the disarm."""
    config, name = make_bench()

    async def first() -> tuple[int, int]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 30.0, "p0": 20.0}, volts=True)
            async with ctl.claim(["c0"], owner="scan:review", purpose="scan") as claim:
                await claim.move({"c0": 0.0}, volts=True, journal=False)
            await ctl.disarm()
            board = int(inprocess.get(name).board("b0").codes[ctl.actuators["c0"].config.output.index])
            return board, ctl.journal.latest_targets()["c0"].code

    async def restarted() -> bool:
        async with open_controller(config) as ctl:
            return bool(ctl.board_states()["b0"]["needs_restore"])

    board_code, journaled_code = run(first())
    assert board_code == 0
    assert journaled_code == 0, f"journal still says c0 at code {journaled_code} after the disarm"
    assert not run(restarted()), "a restart after a disarm waits to restore outputs to their pre-disarm values"
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_a_set_an_estop_stops_while_it_plans_leaves_the_zeros_last_in_the_journal(
    make_bench: Bench, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A set large enough to be planned off the loop, stopped by an estop while it plans, writes
    nothing and must journal nothing after the estop's zeros: the journal's last targets stay the
    zeros, so a restart adopts the board rather than offering to restore the stopped set."""
    config, name = make_bench()
    planning, go_on = threading.Event(), threading.Event()

    def plan_after_the_estop(*args: Any) -> RampPlan:
        planning.set()
        go_on.wait(10)
        return plan_ramp(*args)

    monkeypatch.setattr(motion, "PLAN_IN_THREAD_ABOVE", 0)  # as for a request of more than 32 actuators
    monkeypatch.setattr(motion, "plan_ramp", plan_after_the_estop)

    async def first() -> dict[str, int]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            task = asyncio.create_task(ctl.set({"c0": 30.0, "p0": 20.0}, volts=True))
            await asyncio.to_thread(planning.wait, 10)
            await ctl.estop(reason="review")
            go_on.set()
            with pytest.raises(StoppedRefused):
                await task
            return {a: r.code for a, r in ctl.journal.latest_targets().items()}

    async def restarted() -> bool:
        async with open_controller(config) as ctl:
            return bool(ctl.board_states()["b0"]["needs_restore"])

    journaled = run(first())
    assert not inprocess.get(name).board("b0").codes.any()
    assert journaled.get("c0", 0) == 0 and journaled.get("p0", 0) == 0, f"journal after the estop: {journaled}"
    assert not run(restarted())
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_an_estop_confirmed_late_journals_the_boards_zeros(make_bench: Bench) -> None:
    """A board that could not confirm an estop's zero at once and confirms it at a later heartbeat
    holds zeros then: its outputs' last journaled targets must be zeros too, not the targets from
    before the estop (a restart would otherwise offer to restore them)."""
    config, name = make_bench(timeout_s=0.02, retries=1, error_rate_limit=0.2)

    async def scenario() -> dict[str, int]:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            await ctl.arm()
            await ctl.set({"c0": 20.0, "p0": 30.0}, volts=True)
            rack.inject(Fault("drop", "*", 1.0))
            for _ in range(40):
                await ctl.heartbeat_once()
                if ctl.boards["b0"].faulted:
                    break
            assert ctl.estopped and ctl.boards["b0"].zero_pending is not None
            rack.links["b0"].rates.clear()
            await ctl.heartbeat_once()
            assert ctl.boards["b0"].zero_pending is None and not rack.board("b0").codes.any()
            return {a: r.code for a, r in ctl.journal.latest_targets().items()}

    journaled = run(scenario())
    assert journaled.get("c0", 0) == 0 and journaled.get("p0", 0) == 0, f"journal after the late zero: {journaled}"
