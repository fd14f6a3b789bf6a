"""The controller on an in-process simulated rack: the design's rules, observed at the board."""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import Config
from meshwarden.errors import (
    FaultedRefused,
    LimitRefused,
    MeshwardenError,
    NotArmedRefused,
    RefusedError,
    UnknownTargetRefused,
    UnreachableRefused,
)
from meshwarden.journal import Journal
from tests.control.conftest import run

Bench = Callable[..., tuple[Config, str]]


def test_starts_disarmed_and_refuses_to_raise_outputs(make_bench: Bench) -> None:
    """Rule 3: disarmed at start; a set away from zero is refused, nothing written, refusal journaled."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            assert not ctl.armed
            with pytest.raises(NotArmedRefused, match="arm first"):
                await ctl.set({"c0": 0.2})
            assert inprocess.get(name).board("b0").writes_executed == 0

    run(scenario())
    with Journal(config.journal.path) as journal:
        assert journal.target_count() == 0
        assert [e.detail["code"] for e in journal.events(kind="refused")] == ["not_armed"]


def test_set_reaches_the_board_and_the_actuator(make_bench: Bench) -> None:
    """An armed set lands on the right channel with the mapped voltage; gate attributes work."""
    config, name = make_bench()

    async def scenario() -> dict:
        async with open_controller(config) as ctl:
            await ctl.arm()
            result = await ctl.set({"g0.kappa": 0.5, "g0.phase": 1.0, "c1": 0.1})
            # let the last step ring down: tau = Q / (pi f0) = 200 / (pi 500 kHz) = 0.13 ms (standard)
            await asyncio.sleep(0.005)
            truth = inprocess.get(name).truth()
            assert truth.terminal_volts[0] == pytest.approx(result["c0"]["volts"], abs=1e-9)
            assert truth.terminal_volts[2] == pytest.approx(result["c1"]["volts"], abs=1e-9)
            # no spread in the bench chip: the nominal calibration is right to within quantisation
            assert truth.kappa[0] == pytest.approx(0.5, abs=2e-3)
            assert truth.phase_rad[0] == pytest.approx(1.0, abs=2e-3)
            return result

    result = run(scenario())
    assert result["c0"]["value"] == 0.5 and result["c0"]["code"] > 0


def test_a_request_is_applied_whole_or_not_at_all(make_bench: Bench) -> None:
    """One unreachable or unknown item refuses the whole request before any write (rule 6)."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            board = inprocess.get(name).board("b0")
            for bad, error in (
                ({"c0": 0.3, "c1": 1.5}, UnreachableRefused),
                ({"c0": 0.3, "zz": 1.0}, UnknownTargetRefused),
                ({"c0": 0.3, "p1": 45.0}, LimitRefused),
                ({"c0": math.nan}, UnreachableRefused),
            ):
                volts = "p1" in bad
                with pytest.raises(error):
                    await ctl.set(bad, volts=volts)
                assert board.writes_executed == 0
            assert ctl.snapshot()["actuators"]["c0"]["code"] == 0

    run(scenario())


def test_above_limit_in_volts_is_refused_with_the_limit(make_bench: Bench) -> None:
    """A request in volts above the hard limit is refused and names the limit."""
    config, _ = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            with pytest.raises(LimitRefused, match="hard limit 40 V"):
                await ctl.set({"c0": 40.5}, volts=True)

    run(scenario())


def test_estop_wins_over_a_ramp_in_progress(make_bench: Bench) -> None:
    """An emergency stop during a long ramp zeroes every output, latches, and refuses sets until re-armed."""
    config, name = make_bench(dwell="50 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            ramp = asyncio.create_task(ctl.set({"c0": 38.0, "c1": 38.0}, volts=True))
            await asyncio.sleep(0.3)
            outcome = await ctl.estop(reason="test")
            with pytest.raises(RefusedError):
                await ramp
            assert outcome == {"b0": "zero"}
            assert (inprocess.get(name).board("b0").codes == 0).all()
            assert inprocess.get(name).truth().terminal_volts.max() == 0.0
            with pytest.raises(NotArmedRefused, match="emergency stop is latched"):
                await ctl.set({"c0": 1.0}, volts=True)
            await ctl.arm()
            await ctl.set({"c0": 1.0}, volts=True)

    run(scenario())


def test_disarm_ramps_to_zero_within_the_step_limit(make_bench: Bench) -> None:
    """Disarm ramps every output to zero in guarded steps, and afterwards nothing may rise."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 30.0, "p0": 30.0}, volts=True)
            await ctl.disarm()
            assert not ctl.armed
            board = inprocess.get(name).board("b0")
            assert (board.codes == 0).all()
            # a set toward zero is allowed while disarmed; away from zero is not
            with pytest.raises(NotArmedRefused):
                await ctl.set({"c0": 1.0}, volts=True)

    run(scenario())
    _check_write_log(config, name)


def _check_write_log(config: Config, name: str) -> None:
    """Every write the board saw: within hard limits, within step limits of the previous value of
    that channel, and not sooner than the dwell after the previous write to it."""
    board = inprocess.get(name).board("b0")
    lsb = 60.0 / 65536
    limits = {a.output.index: a for a in config.chip.actuators}
    last_code = {ch: 0 for ch in limits}
    last_time = {ch: -math.inf for ch in limits}
    for t, kind, first, codes in board.write_log:
        if kind in ("zero", "boot", "ramped_to_zero"):
            last_code = {ch: 0 for ch in limits}
            continue
        for offset, code in enumerate(codes):
            ch = first + offset
            if ch not in limits:
                assert code == 0
                continue
            act = limits[ch]
            assert code * lsb <= config.hard_limit_volts(act) + 1e-9, (ch, code)
            if code != last_code[ch]:
                assert abs(code - last_code[ch]) * lsb <= act.step_limit_volts + 1e-9, (ch, last_code[ch], code)
                assert t - last_time[ch] >= act.dwell_s * 0.999, (ch, t - last_time[ch])
                last_time[ch] = t
            last_code[ch] = code


operations = st.lists(
    st.one_of(
        st.tuples(
            st.just("set"),
            st.dictionaries(
                st.sampled_from(["c0", "p0", "c1", "p1"]),
                st.one_of(st.floats(-5.0, 50.0), st.just(math.nan)),
                min_size=1,
                max_size=4,
            ),
        ),
        st.tuples(
            st.just("logical"),
            st.dictionaries(
                st.sampled_from(["g0.kappa", "g0.phase", "g1.kappa", "g1.phase"]),
                st.floats(-1.0, 8.0),
                min_size=1,
                max_size=4,
            ),
        ),
        st.tuples(st.sampled_from(["arm", "disarm", "estop"]), st.just({})),
        st.tuples(st.just("faults"), st.floats(0.0, 0.1)),
    ),
    min_size=1,
    max_size=8,
)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(operations)
def test_no_sequence_of_requests_breaks_a_rule(make_bench: Bench, ops: list) -> None:
    """For any sequence of sets (volts or logical), arm, disarm, estop and link faults (corrupted,
    lost, repeated frames): no code above its limit, no step above its step limit, every dwell
    kept, and estop leaves every output at zero."""
    config, name = make_bench(dwell="1 ms")

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            for op, args in ops:
                try:
                    if op == "set":
                        await ctl.set(args, volts=True)
                    elif op == "logical":
                        await ctl.set(args)
                    elif op == "arm":
                        await ctl.arm()
                    elif op == "disarm":
                        await ctl.disarm()
                    elif op == "faults":
                        for kind in ("corrupt", "drop", "repeat"):
                            inprocess.get(name).inject(Fault(kind, "*", args))
                    else:
                        await ctl.estop()
                        assert (inprocess.get(name).board("b0").codes == 0).all()
                except MeshwardenError:
                    pass  # refusals and link failures alike: the rules below must hold anyway

    run(scenario())
    _check_write_log(config, name)


def test_guard_plans_never_snap_but_a_raw_step_does(make_bench: Bench) -> None:
    """In a vacuum-sealed chip (Q = 10000) with a thin 5 % margin, ramping a coupler to 0.93 V_PI
    through the guard leaves it free; the same change as one raw step snaps it (dynamic pull-in,
    threshold sqrt(27/32) V_PI for an undamped step) - the guard matters."""
    config, name = make_bench(coupler_q=10000, margin=0.05, coupler_limit=47, dwell="40 ms")
    target = 46.8

    async def guarded() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": target}, volts=True)
            truth = inprocess.get(name).truth()
            assert not truth.pulled_in[0]
            assert truth.terminal_volts[0] == pytest.approx(target, abs=0.01)

    run(guarded())

    raw_config, raw_name = make_bench(coupler_q=10000, margin=0.05, coupler_limit=47)
    from meshwarden.testing import unguarded_driver

    driver = unguarded_driver(raw_config.rack.boards[0])
    driver.open()
    try:
        driver.clear_faults()
        driver.write_codes(0, (round(target / (60.0 / 65536)),))
    finally:
        driver.close()
    assert inprocess.get(raw_name).truth().pulled_in[0]


def test_link_faults_never_apply_a_wrong_code(make_bench: Bench) -> None:
    """With corrupted, lost, repeated, garbled and misaddressed frames the controller's sets still
    land exactly, and the board never latches a code that was not planned."""
    config, name = make_bench(timeout_s=0.05, retries=8)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            for kind, rate in (
                ("corrupt", 0.05),
                ("drop", 0.05),
                ("repeat", 0.05),
                ("garbage", 0.05),
                ("wrong_address", 0.05),
            ):
                rack.inject(Fault(kind, "*", rate))
            await ctl.arm()
            for volts in (5.0, 12.0, 3.0, 20.0):
                await ctl.set({"c0": volts, "p0": volts + 1, "c1": volts / 2}, volts=True)
                board = rack.board("b0")
                assert board.codes[0] == ctl.snapshot()["actuators"]["c0"]["code"]
                assert board.codes[1] == ctl.snapshot()["actuators"]["p0"]["code"]

    run(scenario())
    _check_write_log(config, name)


def test_a_flaky_link_faults_the_board_and_the_rack_goes_safe(make_bench: Bench) -> None:
    """Too many link errors fault the board and estop the rack; arming is refused until the
    operator recovers the board."""
    config, name = make_bench(timeout_s=0.02, retries=1, error_rate_limit=0.2)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 4.0}, volts=True)
            inprocess.get(name).inject(Fault("drop", "*", 0.9))
            for _ in range(30):
                await ctl.heartbeat_once()
                if ctl.estopped:
                    break
            assert ctl.estopped and ctl.boards["b0"].faulted
            with pytest.raises(FaultedRefused):
                await ctl.arm()
            rack = inprocess.get(name)
            rack.links["b0"].rates.clear()  # the operator fixes the cable
            recovered = await ctl.recover("b0")
            assert recovered["board"] == "b0" and not ctl.boards["b0"].faulted
            await ctl.arm()

    run(scenario())
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="board_faulted")


def test_board_reset_is_detected_journaled_and_restored(make_bench: Bench) -> None:
    """A brown-out is noticed by the heartbeat, journaled, blocks sets on that board, and restore brings the targets back."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            applied = await ctl.set({"c0": 20.0, "p0": 10.0}, volts=True)
            rack = inprocess.get(name)
            rack.board("b0").power_cycle(rack.clock.now() - 1.0)  # a brown-out, already booted again
            await ctl.heartbeat_once()
            assert ctl.boards["b0"].needs_restore
            assert ctl.snapshot()["actuators"]["c0"]["code"] == 0
            with pytest.raises(FaultedRefused, match="waiting for restore"):
                await ctl.set({"c0": 1.0}, volts=True)
            await ctl.arm()
            restored = await ctl.restore()
            assert restored["c0"]["code"] == applied["c0"]["code"]
            assert rack.board("b0").codes[0] == applied["c0"]["code"]

    run(scenario())
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="board_reset_detected")


def test_restart_adopts_outputs_without_writing(make_bench: Bench) -> None:
    """Rule 5: a new controller finds the boards holding the journaled codes and writes nothing."""
    config, name = make_bench()

    async def first() -> dict:
        async with open_controller(config) as ctl:
            await ctl.arm()
            return await ctl.set({"g0.kappa": 0.4})

    applied = run(first())
    board = inprocess.get(name).board("b0")
    writes = board.writes_executed

    async def second() -> None:
        async with open_controller(config) as ctl:
            assert not ctl.armed
            assert ctl.snapshot()["actuators"]["c0"]["code"] == applied["c0"]["code"]
            assert ctl.snapshot()["actuators"]["c0"]["value"] == 0.4
            assert not ctl.boards["b0"].needs_restore

    run(second())
    assert board.writes_executed == writes
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="adopted")


def test_a_watchdog_trip_while_stalled_is_noticed_and_never_causes_a_jump(make_bench: Bench) -> None:
    """If the daemon stalls past the watchdog timeout, the board ramps to zero on its own. The next
    heartbeat notices, the controller re-reads the outputs, and a later set ramps up from the real
    zero within the step limit - not from the stale value it believed."""
    config, name = make_bench(watchdog_s=1)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 10.0}, volts=True)
            assert ctl._heartbeat_task is not None
            ctl._heartbeat_task.cancel()  # the daemon stalls: no heartbeats
            await asyncio.sleep(2.0)  # 1 s timeout, then 20 V/s down to zero
            assert inprocess.get(name).truth().terminal_volts[0] == 0.0
            await ctl.heartbeat_once()
            assert ctl.boards["b0"].needs_restore
            assert ctl.snapshot()["actuators"]["c0"]["code"] == 0
            await ctl.arm()
            await ctl.restore()
            await ctl.set({"c0": 12.0}, volts=True)

    run(scenario())
    _check_write_log(config, name)
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="watchdog_tripped")


def test_a_rack_powered_after_the_daemon_is_brought_up_by_the_heartbeat(tmp_path: Path) -> None:
    """A board that cannot be reached at start is marked unreachable (arming is refused); once its
    link answers, the next heartbeat brings it up and adopts it, and the daemon can arm."""
    import dataclasses

    from meshsim.rack import SimRack
    from meshsim.serve import RackServer
    from meshwarden.config import load_config
    from meshwarden.config.model import RackConfig
    from meshwarden.testing import free_port
    from tests.control.bench import write_bench

    path, _ = write_bench(tmp_path)
    port = free_port()
    config = load_config(path)
    board = dataclasses.replace(config.rack.boards[0], url=f"socket://127.0.0.1:{port}", timeout_s=0.1, retries=0)
    config = dataclasses.replace(config, rack=RackConfig((board,)))
    rack = SimRack.from_config(path)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            assert ctl.boards["b0"].faulted
            with pytest.raises(FaultedRefused):
                await ctl.arm()
            with RackServer(rack, "tcp", base_port=port):
                for _ in range(50):
                    await ctl.heartbeat_once()
                    if not ctl.boards["b0"].faulted:
                        break
                    await asyncio.sleep(0.1)
                assert not ctl.boards["b0"].faulted
                await ctl.arm()
                await ctl.set({"c0": 2.0}, volts=True)
                assert int(rack.board("b0").codes[0]) > 0

    run(scenario())
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="board_unreachable") and journal.events(kind="board_up")


def test_sense_reads_what_the_outputs_really_put_out(make_bench: Bench) -> None:
    """The boards' own output sense follows the commanded volts, and shows a driver fault: a
    shorted output sags while the command stays (common practice for telling driver from chip)."""
    config, name = make_bench()

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            applied = await ctl.set({"c0": 20.0, "p0": 10.0}, volts=True)
            sense = await ctl.read_sense()
            assert sense["c0"] == pytest.approx(applied["c0"]["volts"], abs=0.02)
            assert sense["p0"] == pytest.approx(applied["p0"]["volts"], abs=0.02)
            inprocess.get(name).inject(Fault("short", "b0:0", 0.5))
            assert (await ctl.read_sense())["c0"] == pytest.approx(applied["c0"]["volts"] / 2, abs=0.02)

    run(scenario())


def test_an_output_found_above_a_lowered_limit_blocks_arming_until_disarmed(make_bench: Bench) -> None:
    """If the limit was lowered while a board held a higher code, the next start adopts without a
    jump but reports it; arming is refused until disarm has ramped the output down."""
    config, name = make_bench()

    async def first() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"p0": 30.0}, volts=True)

    run(first())
    import dataclasses

    lowered = dataclasses.replace(
        config,
        chip=dataclasses.replace(
            config.chip,
            actuators=tuple(
                dataclasses.replace(a, limit_volts=20.0) if a.id == "p0" else a for a in config.chip.actuators
            ),
        ),
    )

    async def second() -> None:
        async with open_controller(lowered) as ctl:
            assert ctl.over_limit() == ["p0"]
            with pytest.raises(LimitRefused, match="p0 above the hard limit"):
                await ctl.arm()
            await ctl.disarm()
            assert ctl.over_limit() == []
            await ctl.arm()

    run(second())
    _check_write_log(config, name)
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="above_limit")


def test_arming_notices_a_tripped_watchdog_before_clearing_it(make_bench: Bench) -> None:
    """Arming right after a stall (no heartbeat in between) still records the trip and resyncs
    the outputs before it clears the board's flags, so no ramp starts from a stale value."""
    config, _ = make_bench(watchdog_s=1)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 10.0}, volts=True)
            assert ctl._heartbeat_task is not None
            ctl._heartbeat_task.cancel()
            await asyncio.sleep(2.0)
            await ctl.arm()
            assert ctl.boards["b0"].needs_restore
            assert ctl.snapshot()["actuators"]["c0"]["code"] == 0

    run(scenario())
    with Journal(config.journal.path) as journal:
        assert journal.events(kind="watchdog_tripped")
