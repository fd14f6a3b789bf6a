"""REVIEW: what the journal says after a disarm that follows unjournaled motion (a procedure's fast
steps), checked against what the board holds and what a restarted daemon then does."""

from __future__ import annotations

from collections.abc import Callable

from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import Config
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
