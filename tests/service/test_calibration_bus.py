"""Calibration over the bus and the command line, against the daemon as a process."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from meshwarden.errors import BusError, UnknownTargetRefused
from meshwarden.service.schema import parse_request
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
    # the bench's c1 has its own phase shifter as a measured neighbour (its taps see c1 directly)
    assert "crosstalk (share of a neighbour's V^2" in shown.stdout and "      c1  <- p1 " in shown.stdout
    assert cli("calibration", "list", "--plot", "x", "--endpoint", daemon.endpoint).returncode == 2
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


def test_calibrate_plot_draws_each_swept_actuator_and_the_lattice(daemon: Daemon, tmp_path: Path) -> None:
    """`calibrate --json --plot DIR` still prints one JSON report; DIR gets c0.png, c1.png, p0.png and
    overview.png when matplotlib is installed (else one line names the extra and nothing is drawn);
    `calibration show VERSION --plot DIR` draws the same files; over the bus, `sweeps: true` adds
    the points (p1, unobservable, has none) and the layout, and the plain reply stays as it was."""
    with daemon.client() as mw:
        mw.arm()
    result = cli("calibrate", "--json", "--plot", str(tmp_path / "run"), "--endpoint", daemon.endpoint)
    assert result.returncode == 0, result.stderr
    report = json.loads(result.stdout)
    shown = cli(
        "calibration",
        "show",
        report["version"],
        "--plot",
        str(tmp_path / "show"),
        "--json",
        "--endpoint",
        daemon.endpoint,
    )
    assert shown.returncode == 0, shown.stderr
    assert set(json.loads(shown.stdout)) == {"version", "active", "manifest"}
    try:
        import matplotlib  # type: ignore[import-not-found, unused-ignore]  # noqa: F401

        for folder in ("run", "show"):
            drawn = sorted(p.name for p in (tmp_path / folder).iterdir())
            assert drawn == ["c0.png", "c1.png", "overview.png", "p0.png"]
            assert all((tmp_path / folder / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for name in drawn)
        assert "no figure for p1" in result.stderr and "unobservable" in result.stderr
    except ImportError:
        assert "--plot needs matplotlib" in result.stderr and not (tmp_path / "run").exists()
        assert "--plot needs matplotlib" in shown.stderr
    assert "Traceback" not in result.stderr + shown.stderr
    with daemon.client() as mw:
        plain = mw.calibration(report["version"])
        full = mw.calibration(report["version"], sweeps=True)
    assert set(plain) == {"version", "active", "manifest"}
    assert sorted(full["sweeps"]) == ["c0", "c1", "p0"] and full["layout"]["gates"]["g0"] == [0, 0]
    assert full["gates"]["g1"] == {"coupler": "c1", "phase": "p1"}
    for actuator, sweep in full["sweeps"].items():
        assert len(sweep["volts"]) == len(sweep["measured"]) == len(sweep["fitted"])
        assert sum(f is not None for f in sweep["fitted"]) == report["actuators"][actuator]["points"]


def test_calibration_show_takes_sweeps_only_as_a_boolean() -> None:
    """`calibration_show` with a `sweeps` that is not true or false is refused before any handler runs."""
    raw = json.dumps(
        {"v": 1, "id": "r1", "client": "c", "op": "calibration_show", "args": {"version": "v", "sweeps": "yes"}}
    ).encode()
    with pytest.raises(BusError) as caught:
        parse_request(raw)
    assert caught.value.code == "bad_request"
