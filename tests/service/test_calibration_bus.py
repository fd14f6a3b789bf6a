"""Calibration over the bus and the command line, against the daemon as a process."""

from __future__ import annotations

import json

import pytest

from meshwarden.errors import UnknownTargetRefused
from tests.service.daemon import Daemon
from tests.service.test_daemon import cli


def test_calibrate_from_the_command_line_prints_the_pinned_report(daemon: Daemon) -> None:
    """`meshwarden calibrate --json` runs the job, prints {version, activated, frames, actuators:
    {ID: {status, residual, points, frames, reason}}}; `calibration list` shows it active; rolling
    back to the configuration's tables and showing a version work; unknown versions are refused."""
    with daemon.client() as mw:
        mw.arm()
    result = cli("calibrate", "--json", "--endpoint", daemon.endpoint, "--ramp-timeout", "120")
    assert result.returncode == 0, result.stderr
    report = json.loads(result.stdout)
    assert set(report) >= {"version", "activated", "frames", "actuators"} and report["activated"]
    assert set(report["actuators"]["c0"]) == {"status", "residual", "points", "frames", "reason"}
    assert report["actuators"]["c0"]["status"] == "ok" and report["actuators"]["p1"]["status"] == "unobservable"
    listed = json.loads(cli("calibration", "list", "--json", "--endpoint", daemon.endpoint).stdout)
    assert [r["version"] for r in listed] == ["config", report["version"]] and listed[1]["active"]
    back = cli("calibration", "activate", "config", "--endpoint", daemon.endpoint)
    assert back.returncode == 0 and "no output moved" in back.stdout
    shown = cli("calibration", "show", report["version"], "--endpoint", daemon.endpoint)
    assert shown.returncode == 0 and "method" in shown.stdout
    missing = cli("calibration", "activate", "cal-nope", "--endpoint", daemon.endpoint)
    assert missing.returncode == 1 and "no calibration version 'cal-nope'" in missing.stderr


def test_calibration_refusals_over_the_bus(daemon: Daemon) -> None:
    """Unknown targets and out-of-range points are refused with their reason; nothing is stored."""
    with daemon.client() as mw:
        mw.arm()
        with pytest.raises(UnknownTargetRefused, match="zz"):
            mw.calibrate(["zz"])
        with pytest.raises(Exception, match="points"):
            mw.calibrate(points=3)
        assert [r["version"] for r in mw.calibrations()] == ["config"]
