"""Adversarial checks of the day's changes (emergency-stop marker, `serve --calibration`,
activation with shares, rule 4 across concurrent requests), observed at the simulated boards."""

from __future__ import annotations

import asyncio
import math
import shutil
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import Config
from meshwarden.errors import MeshwardenError
from meshwarden.writelog import check_board_log
from tests.control.bench import write_bench
from tests.control.conftest import run
from tests.control.test_review_crosstalk import _version_with

Bench = Callable[..., tuple[Config, str]]
VOLTS_PER_CODE = 60.0 / 65536  # the bench board: 16-bit DAC, 60 V full scale


def _worst_equivalent(log: list[tuple[object, ...]], on: int, by: int, share: float) -> float:
    """The highest sqrt(V_on^2 + share x V_by^2) the board held after any write (channels of b0)."""
    held = {on: 0.0, by: 0.0}
    worst = 0.0
    for _, kind, first, values in log:
        if kind == "write":
            for k, code in enumerate(values):  # type: ignore[arg-type]
                if first + k in held:  # type: ignore[operator]
                    held[first + k] = code * VOLTS_PER_CODE  # type: ignore[operator]
            worst = max(worst, math.sqrt(held[on] ** 2 + share * held[by] ** 2))
    return worst


def test_a_set_beside_a_restore_cannot_pass_the_limit_through_crosstalk(make_bench: Bench) -> None:
    """With p0's share 0.5 on c0 (limit 40 V), c0 journaled at 35 V and the board reset: while
    restore ramps c0 back to 35 V, a set of p0 (never journaled) to 44 V must be refused, since
    where the restore ends c0 is driven as sqrt(35^2 + 0.5 x 44^2) = 46.8 V; the board never holds
    more than 40 V equivalent."""
    config, name = make_bench(within_gate=0.0)

    async def scenario() -> str:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-restore", {"c0": {"p0": 0.5}})
            await ctl.activate_calibration("xt-restore")
            await ctl.arm()
            await ctl.set({"c0": 35.0}, volts=True)
            rack = inprocess.get(name)
            rack.board("b0").power_cycle(rack.clock.now() - 1.0)  # a brown-out: c0 at 0 V
            await ctl.heartbeat_once()
            await ctl.arm()
            restoring = asyncio.create_task(ctl.restore(client="restorer"))
            while not 0.0 < ctl.describe("c0")["volts"] < 20.0:
                await asyncio.sleep(0.0005)
            outcome = "applied"
            try:
                await ctl.set({"p0": 44.0}, volts=True, client="second")
            except MeshwardenError as exc:
                outcome = exc.code
            await restoring
            await ctl.disarm()
            return outcome

    outcome = run(scenario())
    log = list(inprocess.get(name).board("b0").write_log)
    assert not check_board_log(config, "b0", log).violations
    worst = _worst_equivalent(log, 0, 1, 0.5)  # b0:0 is c0, b0:1 is p0
    assert worst <= 40.0 + 1e-6, f"set beside restore: {outcome}; c0 driven as {worst:.2f} V"


def _serve(config: Path, *more: str) -> subprocess.CompletedProcess[str]:
    """`meshwarden serve` on ports it cannot bind (port 9): it stops at start, after the
    calibration choice, so only what that choice did is seen."""
    unbindable = ["--bind", "tcp://127.0.0.1:9", "--pub", "tcp://127.0.0.1:9"]
    return subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", "serve", "--config", str(config), *more, *unbindable],
        capture_output=True,
        text=True,
        timeout=120,
    )


def _stored(tmp_path: Path, version: str) -> Path:
    """A version folder holding copies of the bench's own tables and an empty manifest."""
    folder = tmp_path / "calibration" / "versions" / version
    folder.mkdir(parents=True)
    for table in (tmp_path / "cal").glob("*.yaml"):
        shutil.copy(table, folder / table.name)
    (folder / "manifest.yaml").write_text("{}\n", encoding="utf-8")
    return folder


@pytest.mark.parametrize("version", ["..", ".", "", ".good.partial"])
def test_serve_calibration_refuses_a_name_that_is_no_version_and_keeps_the_pointer(
    tmp_path: Path, version: str
) -> None:
    """`serve --calibration` with '..', '.', an empty name or a staging folder's name is a usage
    error naming the version, and the active pointer stays on the version it named before."""
    config, _ = write_bench(tmp_path)
    _stored(tmp_path, "good")
    (tmp_path / "calibration" / "versions" / ".good.partial").mkdir()
    (tmp_path / "calibration" / "active").write_text("good\n", encoding="utf-8")
    result = _serve(config, "--calibration", version)
    assert result.returncode == 2, result.stderr
    assert f"no calibration version '{version}'" in result.stderr, result.stderr
    assert (tmp_path / "calibration" / "active").read_text(encoding="utf-8").strip() == "good"


def test_serve_calibration_that_does_not_fit_leaves_the_active_version_as_it_was(tmp_path: Path) -> None:
    """A start refused because the version named by `serve --calibration` does not fit the
    configuration changes nothing: the version active before stays active."""
    config, _ = write_bench(tmp_path)
    _stored(tmp_path, "good")
    bad = _stored(tmp_path, "bad")
    shutil.copy(tmp_path / "cal" / "p0.yaml", bad / "c0.yaml")  # a phase table for a coupler
    (tmp_path / "calibration" / "active").write_text("good\n", encoding="utf-8")
    result = _serve(config, "--calibration", "bad")
    assert result.returncode == 2 and "table c0 does not fit" in result.stderr, result.stderr
    assert (tmp_path / "calibration" / "active").read_text(encoding="utf-8").strip() == "good"


@pytest.mark.parametrize("manifest", [b": : :\n  - [\n", b"\xff\xfe\x00garbage"])
def test_a_version_whose_manifest_is_garbage_is_refused_by_name(tmp_path: Path, manifest: bytes) -> None:
    """A version folder whose manifest is not YAML (or not text) is refused at start with a
    message that names the version and the way out, not reported as an internal error."""
    config, _ = write_bench(tmp_path)
    (_stored(tmp_path, "junk") / "manifest.yaml").write_bytes(manifest)
    result = _serve(config, "--calibration", "junk")
    assert result.returncode == 2, result.stderr
    assert "internal error" not in result.stderr and "Traceback" not in result.stderr, result.stderr
    assert "calibration version 'junk'" in result.stderr and "serve --calibration VERSION" in result.stderr
