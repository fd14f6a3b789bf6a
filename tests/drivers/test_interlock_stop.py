"""Opening a hardware interlock during a ramp stops the whole rack and latches (ISO 13850 style):
every board at zero, ``arm`` refused until the contact is closed and an operator arms again.
Observed at the simulated boards, for both drivers."""

from __future__ import annotations

import asyncio
import time
from pathlib import Path

import pytest

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.errors import InterlockOpenRefused, MeshwardenError, NotArmedRefused
from meshwarden.journal import Journal
from meshwarden.writelog import check_board_log
from tests.drivers.benches import DRIVERS, write_two_board_bench


async def _until(condition: object, what: str, limit_s: float = 20.0) -> None:
    """Wait for ``condition()`` (a wait with a generous cap, not a timing assertion)."""
    deadline = time.monotonic() + limit_s
    while not condition():  # type: ignore[operator]
        assert time.monotonic() < deadline, f"gave up waiting for {what}"
        await asyncio.sleep(0.005)


def _all_zero_index(log: list[tuple[float, str, int, tuple[int, ...]]], since: float) -> int | None:
    """The index of the first write-log entry at or after ``since`` that leaves every output at
    zero, replaying the log (a SCPI board zeroes channel by channel, a reference one at once)."""
    codes: dict[int, int] = {}
    for index, (t, kind, first, values) in enumerate(log):
        if kind in ("boot", "zero", "ramped_to_zero"):
            codes.clear()
        elif kind == "output_off":
            codes[first] = 0
        elif kind == "write":
            codes.update({first + k: v for k, v in enumerate(values)})
        if t >= since and not any(codes.values()):
            return index
    return None


@pytest.mark.parametrize("driver", DRIVERS)
def test_interlock_opening_during_a_ramp_zeroes_every_board_and_blocks_arm(tmp_path: Path, driver: str) -> None:
    """The interlock on b0 opens mid-ramp: both boards end at zero with nothing written after the
    zero, arm is refused while it is open, and after it closes the stop stays latched until armed."""
    path, name = write_two_board_bench(tmp_path, driver, dwell="20 ms")
    config = load_config(path)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            b0, b1 = rack.board("b0"), rack.board("b1")
            events: list[str] = []
            ctl.listeners.append(lambda kind, _: events.append(kind))
            await ctl.arm()
            ramp = asyncio.create_task(ctl.set({"c0": 30.0, "p0": 40.0, "c1": 30.0, "p1": 40.0}, volts=True))
            await _until(lambda: sum(e[1] == "write" for e in b1.write_log) >= 3, "the ramp to be under way")
            opened_at = rack.clock.now()
            rack.set_interlock("b0", True)
            await _until(lambda: "estop" in events, "the emergency stop to finish")  # its zeroes answered
            with pytest.raises(MeshwardenError):
                await ramp  # the stop ended the ramp's claim
            assert not ramp.cancelled()
            for board in (b0, b1):
                assert board.codes.tolist() == [0] * 16
                log = list(board.write_log)
                zeroed = _all_zero_index(log, opened_at)
                assert zeroed is not None, "the board was not brought to zero after the interlock opened"
                raised = [e for e in log[zeroed:] if e[1] == "write" and any(e[3])]
                assert raised == [], "an output was raised after the stop"
                assert any(e[1] == "write" and any(e[3]) for e in log[:zeroed]), "the ramp had not reached the board"
                board_id = "b0" if board is b0 else "b1"
                # the design's rules 1-2 at the board, recomputed from the configured numbers
                assert check_board_log(config, board_id, log).violations == []
            snap = ctl.snapshot()
            assert snap["boards"]["b0"]["interlock"] == "open" and snap["boards"]["b1"]["interlock"] is None

            writes_before = (len(b0.write_log), len(b1.write_log))
            with pytest.raises(InterlockOpenRefused, match=r"interlock of board.*b0 \(open\)"):
                await ctl.arm()
            assert not ctl.armed and ctl.estopped
            assert (len(b0.write_log), len(b1.write_log)) == writes_before

            rack.set_interlock("b0", False)
            await _until(lambda: ctl.snapshot()["boards"]["b0"]["interlock"] == "closed", "the closed contact")
            assert ctl.estopped and not ctl.armed  # closing the contact restarts nothing
            with pytest.raises(NotArmedRefused):
                await ctl.set({"c0": 5.0}, volts=True)
            await ctl.arm()  # the operator's deliberate re-arm
            await ctl.set({"c0": 5.0}, volts=True)
            assert b0.codes[0] > 0

    asyncio.run(scenario())
    inprocess.remove(name)
    with Journal(config.journal.path) as journal:
        kinds = [e.kind for e in journal.events() if e.kind.startswith("interlock") or e.kind == "estop"]
        estop = next(e for e in journal.events(kind="estop"))
        refused = [e for e in journal.events(kind="refused") if e.detail.get("reason") == "interlock open"]
    assert kinds[:3] == ["interlock_open", "estop", "interlock_closed"]
    assert "interlock open on board(s) b0" in estop.detail["reason"]
    assert len(refused) == 1


def test_status_table_shows_each_watched_interlock() -> None:
    """The command line's status line names the interlock of a board that has one, and only then."""
    from meshwarden.cli_tables import render

    board = {"boot_count": 1, "faulted": False, "needs_restore": False}
    text = render(
        "status",
        {
            "armed": False,
            "estopped": True,
            "boards": {"b0": {**board, "interlock": "open"}, "b1": {**board, "interlock": None}},
        },
    )
    assert "  b0       boot 1  interlock open\n  b1       boot 1  ok\n" in text


def test_interlock_over_the_bus(tmp_path: Path) -> None:
    """Through the daemon and the client library: an open interlock shows in status, the stop is
    latched, and arm is refused with the interlock_open code until the contact is closed."""
    from meshwarden.client import Client
    from meshwarden.testing import running_daemon

    path, name = write_two_board_bench(tmp_path, "reference")
    with running_daemon(load_config(path)) as (endpoint, pub), Client(endpoint, pub, timeout_s=10.0) as mw:
        mw.arm()
        inprocess.get(name).set_interlock("b0", True)
        deadline = time.monotonic() + 20
        while not mw.status()["estopped"]:
            assert time.monotonic() < deadline, "the daemon did not stop"
            time.sleep(0.01)
        assert mw.status()["boards"]["b0"]["interlock"] == "open"
        with pytest.raises(InterlockOpenRefused) as refused:
            mw.arm()
        assert refused.value.code == "interlock_open" and refused.value.details["interlocks"] == {"b0": "open"}
        inprocess.get(name).set_interlock("b0", False)
        mw.arm()
        assert mw.status()["armed"] and mw.status()["boards"]["b0"]["interlock"] == "closed"
    inprocess.remove(name)


def test_an_interlock_found_open_at_start_stops_at_once(tmp_path: Path) -> None:
    """A contact already open when the daemon starts latches the stop right away: every board is
    zeroed (outputs adopted from an earlier run included) and arm is refused."""
    from meshsim.rack import SimRack

    path, name = write_two_board_bench(tmp_path, "reference")
    rack = inprocess.register(name, SimRack.from_config(path, faults="interlock:b0"))
    config = load_config(path)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await _until(lambda: ctl.estopped and rack.board("b1").write_log[-1][1] == "zero", "the stop")
            with pytest.raises(InterlockOpenRefused):
                await ctl.arm()

    asyncio.run(scenario())
    inprocess.remove(name)
    assert [e[1] for e in rack.board("b0").write_log][-1] == "zero"


def test_a_board_coming_up_late_with_its_interlock_open_stops_the_rack(tmp_path: Path) -> None:
    """A watched board that was away at start and comes up with its contact open stops the rack
    when it is first read, like a contact that opens."""
    from meshsim.rack import SimRack

    path, name = write_two_board_bench(tmp_path, "reference")
    rack = inprocess.register(name, SimRack.from_config(path))
    now = rack.clock.now()
    rack.inject(Fault("unplug", "b0", at_s=now, until_s=now + 1.0))
    rack.set_interlock("b0", True)
    config = load_config(path)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await _until(lambda: ctl.snapshot()["boards"]["b0"]["interlock"] == "board not up", "the first poll")
            assert not ctl.estopped  # an unreachable board alone is the heartbeat's business
            await _until(lambda: ctl.boards["b0"].identity is not None, "b0 to come up", 30.0)
            await _until(lambda: ctl.estopped, "the stop")
            assert ctl.snapshot()["boards"]["b0"]["interlock"] == "open"

    asyncio.run(scenario())
    inprocess.remove(name)
