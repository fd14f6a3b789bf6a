"""Locks over the bus: the lock_start, locks and lock_stop ops, the client methods, the `meshwarden lock`
command, the lock telemetry topic and the refusals."""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest
import structlog

from meshsim import inprocess
from meshwarden.cli import main
from meshwarden.client import Client
from meshwarden.config import load_config
from meshwarden.errors import BusError, BusyRefused, MeshwardenError, UnknownTargetRefused
from meshwarden.testing import running_daemon
from meshwarden.writelog import check_board_log
from tests.procedures.lockbench import write_lock_bench

PINNED = {"state", "actuator", "monitor", "hold", "residual", "value"}


@pytest.fixture(autouse=True)
def _plain_logging() -> object:
    """`meshwarden.cli.main` points logging at this test's captured stderr; put it back afterwards."""
    yield
    structlog.reset_defaults()


def test_locks_through_client_cli_and_telemetry(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A client starts a max lock and a fraction lock; `lock list --json` prints the pinned shape; the lock
    topic reports them locked; `lock stop --all` stops both and `set` works again on the freed actuator."""
    path, rack = write_lock_bench(tmp_path)
    config = load_config(path)
    try:
        with running_daemon(config) as (endpoint, telemetry), Client(endpoint, telemetry) as mw:
            mw.arm()
            mw.set({"s0.kappa": 0.5, "k0.kappa": 0.5, "s1.kappa": 0.5, "k1.kappa": 0.5})
            stream = mw.subscribe(["lock"], timeout_s=5)
            started = mw.lock_start("top", "p0", "m00", "max")
            assert started["top"]["state"] == "acquiring"
            assert main(["lock", "start", "split", "--actuator", "p1", "--monitor", "m02", "--hold", "fraction=0.3",
                         "--against", "m03", "--endpoint", endpoint]) == 0  # fmt: skip
            seen: dict[str, str] = {}
            deadline = time.monotonic() + 10
            for topic, message in stream:
                assert topic == "lock"
                seen[message["lock"]] = message["state"]
                if seen == {"top": "locked", "split": "locked"} or time.monotonic() > deadline:
                    break
            assert seen == {"top": "locked", "split": "locked"}
            capsys.readouterr()
            assert main(["lock", "list", "--json", "--endpoint", endpoint]) == 0
            listed = json.loads(capsys.readouterr().out)
            assert set(listed) == {"top", "split"}
            assert all(set(entry) == PINNED for entry in listed.values())
            assert listed["split"]["hold"] == "fraction=0.3" and listed["top"]["actuator"] == "p0"
            assert main(["lock", "list", "--endpoint", endpoint]) == 0
            assert "split" in capsys.readouterr().out
            with pytest.raises(BusyRefused, match="lock:top"):
                mw.set({"p0": 1.0})
            assert main(["lock", "stop", "--all", "--endpoint", endpoint]) == 0
            assert "stopped: " in capsys.readouterr().out
            assert {d["state"] for d in mw.locks().values()} == {"stopped"}
            assert mw.lock_stop() == []
            mw.set({"p0": 1.0})
        log = list(inprocess.get(rack).board("b0").write_log)
        assert check_board_log(config, "b0", log).violations == []
    finally:
        inprocess.remove(rack)


def test_lock_requests_are_refused_with_their_codes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Bad hold, unknown actuator, out-of-range dither, a too wide bandwidth and an unknown lock are each
    refused with their own code, over the client and as exit code 1 (2 for usage) on the command line."""
    path, rack = write_lock_bench(tmp_path)
    config = load_config(path)
    try:
        with running_daemon(config) as (endpoint, telemetry), Client(endpoint, telemetry) as mw:
            mw.arm()
            cases: list[tuple[dict[str, object], str]] = [
                ({"hold": "maximum"}, "procedure_input"),
                ({"actuator": "p99"}, "unknown_target"),
                ({"dither": 5.0}, "out_of_range"),
                ({"dither": 0.5}, "procedure_input"),
                ({"bandwidth_hz": 200.0}, "procedure_input"),
            ]
            for change, code in cases:
                args: dict[str, object] = {"name": "x", "actuator": "p0", "monitor": "m00", "hold": "max", **change}
                with pytest.raises((MeshwardenError, BusError)) as caught:
                    mw.lock_start(**args)  # type: ignore[arg-type]
                assert caught.value.code == code, (change, caught.value)
            with pytest.raises(UnknownTargetRefused, match="no lock named"):
                mw.lock_stop("nothing")
            assert mw.locks() == {}
            assert main(["lock", "start", "y", "--actuator", "p0", "--monitor", "m00", "--hold", "fraction=2",
                         "--endpoint", endpoint]) == 1  # fmt: skip
            assert "procedure_input" in capsys.readouterr().err
            assert main(["lock", "stop", "--endpoint", endpoint]) == 2
            assert main(["lock", "stop", "y", "--all", "--endpoint", endpoint]) == 2
            assert inprocess.get(rack).board("b0").writes_executed == 0
    finally:
        inprocess.remove(rack)
