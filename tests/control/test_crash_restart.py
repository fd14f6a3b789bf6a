"""kill -9 of a process holding the controller, then a new one: nothing jumps, nothing is lost."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from meshsim.rack import SimRack
from meshsim.serve import RackServer
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.journal import Journal, TargetRecord
from tests.control.bench import write_bench
from tests.control.conftest import run


def test_kill_minus_9_then_adopt_then_board_reset_then_restore(tmp_path: Path) -> None:
    """The simulated rack runs here, served over real ptys; the controller runs in a child process
    that is killed with SIGKILL. A new controller adopts every output without a single write and
    finds the journal intact. After a board brown-out, the next start leaves it at zero and
    disarmed, and restore brings the journaled targets back."""
    config_path, _ = write_bench(tmp_path)
    config = load_config(config_path)
    rack = SimRack.from_config(config_path)
    with RackServer(rack, "pty") as server:
        ports = server.ports()
        log = (tmp_path / "child.log").open("w")
        child = subprocess.Popen(
            [sys.executable, "-m", "tests.control.hold_controller", str(config_path), json.dumps(ports)],
            stdout=subprocess.PIPE,
            stderr=log,
            text=True,
            cwd=Path(__file__).resolve().parents[2],
        )
        try:
            line = child.stdout.readline() if child.stdout else ""
            assert line.startswith("READY "), (tmp_path / "child.log").read_text()
            planned = json.loads(line[len("READY ") :])
        finally:
            os.kill(child.pid, signal.SIGKILL)
            child.wait(timeout=10)
            log.close()
        assert child.returncode == -signal.SIGKILL
        board = rack.board("b0")
        writes_before = board.writes_executed
        codes_before = board.codes.copy()
        assert [int(codes_before[ch]) for ch in (0, 1, 4)] == [planned["c0"], planned["p0"], planned["c1"]]
        with Journal(config.journal.path) as journal:
            targets_before = journal.target_count()
            assert targets_before >= 3

        async def adopt() -> None:
            async with open_controller(config, ports) as ctl:
                assert not ctl.armed and not ctl.boards["b0"].needs_restore
                assert ctl.snapshot()["actuators"]["c0"]["code"] == planned["c0"]

        run(adopt())
        assert board.writes_executed == writes_before
        assert (board.codes == codes_before).all()
        with Journal(config.journal.path) as journal:
            assert journal.target_count() == targets_before
            assert journal.events(kind="adopted")

        board.power_cycle(rack.clock.now() - 1.0)  # a brown-out while no daemon was running

        async def after_reset() -> None:
            async with open_controller(config, ports) as ctl:
                assert not ctl.armed and ctl.boards["b0"].needs_restore
                assert ctl.snapshot()["actuators"]["c0"]["code"] == 0
                assert int(board.codes[0]) == 0
                await ctl.arm()
                restored = await ctl.restore()
                assert {a: restored[a]["code"] for a in ("c0", "p0", "c1")} == planned

        run(after_reset())
        assert [int(board.codes[ch]) for ch in (0, 1, 4)] == [planned["c0"], planned["p0"], planned["c1"]]
        with Journal(config.journal.path) as journal:
            assert journal.events(kind="board_reset_detected")


def test_journal_is_durable_by_configuration(tmp_path: Path) -> None:
    """The journal runs in WAL mode with synchronous=FULL (the documented durability choice)."""
    with Journal(tmp_path / "j.sqlite") as journal:
        mode = journal._db.execute("PRAGMA journal_mode").fetchone()[0]
        sync = journal._db.execute("PRAGMA synchronous").fetchone()[0]
    assert (mode, sync) == ("wal", 2)


def test_kill_minus_9_the_instant_an_estop_answers_never_offers_the_old_targets(tmp_path: Path) -> None:
    """The controller in a child process sets three outputs, is stopped, and kills itself with
    SIGKILL the instant the stop has answered (before the journal's rows of zeros may be on disk).
    The boards hold zero. A new controller must not offer to restore the values the stop took away,
    not even after a board reset: the journal's last word for every output is zero."""
    config_path, _ = write_bench(tmp_path)
    config = load_config(config_path)
    rack = SimRack.from_config(config_path)
    with RackServer(rack, "pty") as server:
        ports = server.ports()
        with (tmp_path / "child.log").open("w") as log:
            child = subprocess.run(
                [sys.executable, "-m", "tests.control.hold_controller", str(config_path), json.dumps(ports), "estop"],
                stdout=subprocess.PIPE,
                stderr=log,
                text=True,
                cwd=Path(__file__).resolve().parents[2],
                timeout=60,
            )
        assert child.returncode == -signal.SIGKILL, (tmp_path / "child.log").read_text()
        assert child.stdout.startswith("READY ")
        board = rack.board("b0")
        assert not board.codes.any()  # what the board received: the stop zeroed it
        with Journal(config.journal.path) as journal:
            latest = {a: r.code for a, r in journal.latest_targets().items()}  # the stop's own rows may be there too
            assert {"c0", "p0", "c1"} <= set(latest) and not any(latest.values()), latest

        async def start_again() -> None:
            async with open_controller(config, ports) as ctl:
                assert not ctl.boards["b0"].needs_restore

        run(start_again())
        board.power_cycle(rack.clock.now() - 1.0)  # and a brown-out while no daemon was running
        run(start_again())
        assert not board.codes.any()


def test_emergency_marker_reads_earlier_targets_as_zero_and_later_ones_as_recorded(tmp_path: Path) -> None:
    """Targets recorded before an emergency stop's marker read as code 0 with no value, also after
    the file is opened again; a target recorded after the marker reads as recorded."""

    def record(actuator: str, code: int) -> TargetRecord:
        return TargetRecord(actuator, "b0", int(actuator[1:]), code * 1e-3, code, 0.5, None, time.time())

    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.record_targets([record("c0", 4000), record("c1", 5000)])
        journal.mark_all_zero_async().result()
        journal.record_targets([record("c1", 6000)])
    with Journal(path) as journal:
        latest = journal.latest_targets()
        assert (latest["c0"].code, latest["c0"].volts, latest["c0"].value) == (0, 0.0, None)
        assert (latest["c1"].code, latest["c1"].value) == (6000, 0.5)
        assert journal.target_count() == 3  # nothing rewritten: the history stays
