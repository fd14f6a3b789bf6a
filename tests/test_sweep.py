"""Sweeps: the grid of points, and a sweep through a daemon written to CSV."""

from __future__ import annotations

import csv
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from meshwarden.errors import MeshwardenError
from meshwarden.sweep import Axis, grid, parse_axis
from tests.control.bench import write_bench
from tests.service.daemon import Daemon, start_daemon


def test_axis_points_match_numpy_linspace() -> None:
    """An axis's points are evenly spaced with both ends included (Source: numpy.linspace as the reference)."""
    for start, stop, n in ((0.0, 6.28, 25), (0.9, 0.1, 5), (3.0, 3.0, 1), (-1.0, 2.0, 7)):
        assert Axis("x", start, stop, n).values() == pytest.approx(list(np.linspace(start, stop, n)), abs=1e-12)


def test_grid_order_first_axis_slowest() -> None:
    """Two axes make every combination, the first axis changing slowest (numpy meshgrid with ij indexing as reference)."""
    a, b = Axis("c0", 0.1, 0.3, 3), Axis("p0", 0.0, 1.0, 2)
    ref_a, ref_b = np.meshgrid(np.linspace(0.1, 0.3, 3), np.linspace(0.0, 1.0, 2), indexing="ij")
    points = grid([a, b])
    assert [p["c0"] for p in points] == pytest.approx(list(ref_a.ravel()))
    assert [p["p0"] for p in points] == pytest.approx(list(ref_b.ravel()))


@pytest.mark.parametrize("spec", ["p0=0:1", "p0=a:1:3", "p0=0:nan:3", "p0=0:1:0", "=0:1:3"])
def test_bad_axis_specs_are_refused(spec: str) -> None:
    """Malformed ranges, NaN ends and empty axes are refused before anything moves."""
    with pytest.raises(MeshwardenError):
        parse_axis(spec)


SWEEP = [sys.executable, "-m", "meshwarden.cli", "sweep"]


def ep(d: Daemon) -> list[str]:
    return ["--endpoint", d.endpoint, "--telemetry", d.pub]


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[Daemon]:
    config, _ = write_bench(tmp_path)
    d = start_daemon(config, tmp_path)
    yield d
    d.stop()


def test_sweep_through_the_daemon_writes_csv(daemon: Daemon, tmp_path: Path) -> None:
    """`meshwarden sweep` sets each grid point through the daemon and writes one CSV row per point,
    with the requested values, the applied volts (rising with kappa: the calibration is monotone)
    and the monitors."""
    with daemon.client() as mw:
        mw.arm()
    out = tmp_path / "scan.csv"
    result = subprocess.run(
        [*SWEEP, "g0.kappa=0.1:0.5:3", "p0=0:1:2", "--out", str(out), "--monitors", "m0,m1", *ep(daemon)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 0, result.stderr
    rows = list(csv.DictReader(out.open(encoding="utf-8")))
    assert len(rows) == 6 and "6 of 6 points written" in result.stdout
    assert list(rows[0]) == ["point", "g0.kappa", "p0", "c0_volts", "p0_volts", "m0_watts", "m1_watts"]
    kappa_volts = [float(r["c0_volts"]) for r in rows[::2]]
    assert kappa_volts == sorted(kappa_volts) and kappa_volts[0] < kappa_volts[-1]
    assert all(float(r["m0_watts"]) >= 0 for r in rows)
    with daemon.client() as mw:
        assert mw.get()["actuators"]["c0"]["value"] == pytest.approx(0.5)


def test_a_refused_point_keeps_the_rows_before_it(daemon: Daemon, tmp_path: Path) -> None:
    """A sweep into a value the calibration cannot reach stops with the refusal (exit 1), keeping
    the rows measured before it."""
    with daemon.client() as mw:
        mw.arm()
    out = tmp_path / "scan.csv"
    result = subprocess.run(
        [*SWEEP, "c0=0.2:1.0:3", "--out", str(out), *ep(daemon)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 1 and "out_of_range" in result.stderr
    assert len(list(csv.DictReader(out.open(encoding="utf-8")))) == 2
