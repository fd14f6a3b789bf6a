"""Motion that keeps the truth: each finding of the adversarial trial, observed at the board.

Every test here reads what the simulated board received (its write log) through
:func:`meshwarden.writelog.check_board_log`, which recomputes the limits from the configured
numbers; none trusts the controller's own view.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable

import pytest

from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import Config
from meshwarden.errors import (
    BusyRefused,
    FaultedRefused,
    LimitRefused,
    MeshwardenError,
    RefusedError,
    StoppedRefused,
    UncertainRefused,
)
from meshwarden.journal import Journal
from meshwarden.writelog import check_board_log
from tests.control.conftest import run

Bench = Callable[..., tuple[Config, str]]
LSB = 60.0 / 65536


def assert_rules_held(config: Config, name: str) -> int:
    """Rules 1-2 on every write the board received; returns how many writes were checked."""
    result = check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log))
    assert not result.violations, "\n".join(str(v) for v in result.violations[:10])
    return result.writes


def test_a_write_latched_but_not_acknowledged_is_re_read_before_the_next_ramp(make_bench: Bench) -> None:
    """At 12 V, a set to 10 V whose replies all come too late (the board latched, the daemon saw a
    timeout) puts the board in doubt; motion on it is refused while it cannot be read, and once
    the link answers the next ramp starts from the 10 V the board really holds - never a 3 V step."""
    config, name = make_bench(timeout_s=0.05, retries=1)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            await ctl.arm()
            await ctl.set({"c0": 12.0}, volts=True)
            rack.inject(Fault("delay", "b0", 1.0, 0.5))
            with pytest.raises(MeshwardenError):
                await ctl.set({"c0": 10.0}, volts=True)
            assert rack.board("b0").codes[0] == round(10.0 / LSB)  # the board did latch it
            with pytest.raises(UncertainRefused):
                await ctl.set({"c0": 14.0}, volts=True)
            rack.links["b0"].rates.clear()
            await asyncio.sleep(0.6)  # the late replies drain
            await ctl.set({"c0": 14.0}, volts=True)
            assert rack.board("b0").codes[0] == round(14.0 / LSB)

    run(scenario())
    assert_rules_held(config, name)


@pytest.mark.parametrize("how", ["cancel", "disarm", "stop"])
def test_stopping_a_ramp_midway_never_breaks_the_step_limit(make_bench: Bench, how: str) -> None:
    """A ramp cancelled as a task, ended by disarm or stopped through its claim, at many moments
    in its steps: the write in flight is recorded, and the next ramp (up again, or disarm's ramp
    down) steps from what the board holds. Replies come 8 ms after the board latched, so a
    stop often lands while a write is in flight."""
    config, name = make_bench(dwell="20 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            inprocess.get(name).inject(Fault("delay", "b0", 1.0, 0.008))
            for i in range(10):
                await ctl.arm()
                claims: list = []
                ramp = asyncio.create_task(
                    ctl.set({"c0": 30.0 if i % 2 else 6.0, "p0": 40.0 - i}, volts=True, stop=claims.append)
                )
                await asyncio.sleep(0.0137 * (i + 1))
                if how == "cancel":
                    ramp.cancel()
                elif how == "stop":
                    claims[0].request_stop("test")
                else:
                    await ctl.disarm()
                with pytest.raises((asyncio.CancelledError, RefusedError)):
                    await ramp
                if how != "disarm":
                    await ctl.set({"c0": 20.0, "p0": 3.0}, volts=True)
            await ctl.disarm()
            assert (inprocess.get(name).board("b0").codes == 0).all()

    run(scenario())
    assert assert_rules_held(config, name) > 20


def test_a_write_carries_only_the_channels_it_plans(make_bench: Bench) -> None:
    """Setting c0 (output 0) and c1 (output 4) never writes outputs 1-3 (p0 and two unwired ones)."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"p0": 6.0}, volts=True)
            log = inprocess.get(name).board("b0").write_log
            start = len(log)
            await ctl.set({"c0": 3.0, "c1": 3.0}, volts=True)
            written = {
                first + i for _, kind, first, codes in list(log)[start:] if kind == "write" for i in range(len(codes))
            }
            assert written == {0, 4}

    run(scenario())
    assert_rules_held(config, name)


def test_a_set_queued_behind_a_ramp_does_not_move_a_board_reset_meanwhile(make_bench: Bench) -> None:
    """Rule 5 under the claim: a set waiting behind a ramp on the same actuator finds the board
    was reset while it waited, and neither the ramp nor the queued set writes to it again."""
    config, name = make_bench(dwell="30 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            await ctl.arm()
            ramp = asyncio.create_task(ctl.set({"c0": 30.0}, volts=True))
            await asyncio.sleep(0.1)
            queued = asyncio.create_task(ctl.set({"c0": 2.0}, volts=True))
            await asyncio.sleep(0.05)
            rack.board("b0").power_cycle(rack.clock.now() - 1.0)
            await ctl.heartbeat_once()
            for task in (ramp, queued):
                with pytest.raises(FaultedRefused):
                    await task
            log = list(rack.board("b0").write_log)
            last_boot = max(i for i, entry in enumerate(log) if entry[1] == "boot")
            assert [e for e in log[last_boot:] if e[1] == "write"] == []

    run(scenario())


def test_an_emergency_stop_zeroes_a_board_faulted_for_its_error_rate(make_bench: Bench) -> None:
    """A board faulted for its link error rate still gets the emergency stop's zero-all (with its
    retries); while it cannot confirm, every heartbeat tries again, and the journal says when
    the zero was confirmed."""
    config, name = make_bench(timeout_s=0.02, retries=1, error_rate_limit=0.2)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            await ctl.arm()
            await ctl.set({"c0": 20.0, "p0": 30.0}, volts=True)
            rack.inject(Fault("drop", "*", 1.0))
            for _ in range(40):
                await ctl.heartbeat_once()
                if ctl.boards["b0"].faulted:
                    break
            assert ctl.boards["b0"].faulted and ctl.estopped
            assert rack.board("b0").codes.any()  # the link is dead: nothing could reach it yet
            assert ctl.boards["b0"].zero_pending is not None
            rack.links["b0"].rates.clear()  # the link mostly works again; the board stays faulted
            await ctl.heartbeat_once()
            assert not rack.board("b0").codes.any()
            assert ctl.boards["b0"].zero_pending is None and ctl.boards["b0"].faulted
            outcome = await ctl.estop(reason="again")  # an explicit estop on the faulted board
            assert outcome == {"b0": "zero"}

    run(scenario())
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="estop_confirmed")


def test_the_driver_refuses_codes_above_each_outputs_ceiling(make_bench: Bench) -> None:
    """Defence in depth: the driver the rack opened refuses a code above an output's hard limit
    (and any code on an unwired output), sending nothing; the controller hands out no raw rack."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            assert not hasattr(ctl, "rack")
            driver = ctl.boards["b0"].driver
            board = inprocess.get(name).board("b0")
            before = board.writes_executed
            with pytest.raises(LimitRefused, match="ceiling"):
                driver.write_codes(0, (round(41.0 / LSB),))  # c0's limit is 40 V
            with pytest.raises(LimitRefused, match="ceiling"):
                driver.write_codes(2, (1,))  # output 2 is wired to nothing
            assert board.writes_executed == before

    run(scenario())


def test_a_held_claim_refuses_other_owners_and_ends_at_disarm(make_bench: Bench) -> None:
    """A procedure's claim moves its actuators through the guard; another owner's set on them is
    refused ``busy`` naming the holder; disarm ends the claim and its next move is refused."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            async with ctl.claim(["g0"], owner="calibrate:job-1", purpose="calibration") as claim:
                await claim.move({"c0": 8.0, "p0": 9.0}, volts=True)
                assert len(await claim.read_monitors()) == 2
                with pytest.raises(BusyRefused, match="calibrate:job-1"):
                    await ctl.set({"c0": 1.0}, volts=True, client="someone")
                await ctl.set({"c1": 1.0}, volts=True, client="someone")  # not held: passes
                await ctl.disarm()
                assert claim.stopping
                with pytest.raises(StoppedRefused):
                    await claim.move({"c0": 0.0}, volts=True)
            assert (inprocess.get(name).board("b0").codes == 0).all()

    run(scenario())
    assert_rules_held(config, name)


@pytest.mark.parametrize("what", ["estop", "disarm"])
def test_an_estop_or_disarm_during_arm_is_not_undone_by_it(make_bench: Bench, what: str) -> None:
    """Replies 20 ms late keep arm() waiting on the board; an estop (or disarm) issued meanwhile
    wins: the arm is refused when it finishes, the daemon stays unarmed, and nothing is written
    after the zero (found by an adversarial review)."""
    config, name = make_bench(dwell="10 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            rack.inject(Fault("delay", "b0", 1.0, 0.02))
            arming = asyncio.create_task(ctl.arm())
            await asyncio.sleep(0.02)
            await (ctl.estop(reason="test") if what == "estop" else ctl.disarm())
            with pytest.raises(RefusedError, match="while arming"):
                await arming
            assert not ctl.armed
            rack.links["b0"].rates.clear()
            with pytest.raises(RefusedError):
                await ctl.set({"c0": 8.0}, volts=True)
            assert [e for e in rack.board("b0").write_log if e[1] == "write"] == []

    run(scenario())


def test_disarm_wins_over_claims_that_arrive_while_it_winds_motion_down(make_bench: Bench) -> None:
    """A procedure's claim that was waiting for a running set, and a lease asked for during the
    disarm, cannot stop the disarm: the claim is ended, the lease refused, every output reaches
    zero (found by an adversarial review)."""
    config, name = make_bench(dwell="20 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            ramp = asyncio.create_task(ctl.set({"c1": 12.0, "p0": 20.0}, volts=True))
            await asyncio.sleep(0.05)

            async def procedure() -> None:
                async with ctl.claim(["c1"], owner="lock:x", purpose="lock"):
                    await asyncio.sleep(2)

            holder = asyncio.create_task(procedure())
            await asyncio.sleep(0)
            disarming = asyncio.create_task(ctl.disarm())
            await asyncio.sleep(0.01)
            with pytest.raises(StoppedRefused, match="disarm or an emergency stop is in progress"):
                ctl.claims.hold_now("alice", ["p1"], ttl_s=30)  # what a bus lease does
            await disarming
            assert ctl.claims.table() == {}
            for task in (ramp, holder):
                task.cancel()
            await asyncio.gather(ramp, holder, return_exceptions=True)
            assert not inprocess.get(name).board("b0").codes.any()

    run(scenario())
    assert_rules_held(config, name)


def test_a_scan_never_undoes_a_set_it_waited_for(make_bench: Bench) -> None:
    """A scan started while a set ramps its actuator waits for the ramp; it then refuses (the
    outputs moved since it planned) instead of putting back the codes from before the set (found
    by an adversarial review)."""
    from meshwarden.procedures.scan_run import run_scan

    config, name = make_bench(dwell="20 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"p0": 10.0}, volts=True)
            ramp = asyncio.create_task(ctl.set({"p0": 30.0}, volts=True))
            await asyncio.sleep(0.02)
            scan = asyncio.create_task(run_scan(ctl, ["p0"], owner="scan:1"))
            applied = await ramp
            with pytest.raises(RefusedError, match="moved while the scan waited"):
                await scan
            assert int(inprocess.get(name).board("b0").codes[1]) == applied["p0"]["code"]

    run(scenario())
    assert_rules_held(config, name)
