"""The demo scenario's configuration, the dump/load round trip, and `meshwarden check-config`."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from meshwarden.calibration import load_calibration
from meshwarden.config import dump_config_text, load_config
from tests.config.minimal import replace_line, write_config
from tests.conftest import DEMO_CONFIG


def run_cli(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    """Run the installed command line as a user would, in a separate process."""
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    return subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=60
    )


def test_round_trip_gives_an_equal_config(tmp_path: Path) -> None:
    """load -> dump -> load of the demo configuration gives an equal object."""
    first = load_config(DEMO_CONFIG)
    dumped = tmp_path / "dumped.yaml"
    dumped.write_text(dump_config_text(first), encoding="utf-8")
    second = load_config(dumped)
    assert second == first
    assert second.chip.actuators[5] == first.chip.actuators[5]


def test_scpi_demo_round_trips_and_shares_the_demo_chip(tmp_path: Path) -> None:
    """config/demo-scpi.yaml loads (scpi options and an interlock included), survives the
    dump/load round trip, and is the demo's chip and calibration on other drivers."""
    scpi = load_config(DEMO_CONFIG.with_name("demo-scpi.yaml"))
    dumped = tmp_path / "dumped.yaml"
    dumped.write_text(dump_config_text(scpi), encoding="utf-8")
    assert load_config(dumped) == scpi
    assert [(b.driver, b.interlock) for b in scpi.rack.boards] == [("scpi", True), ("scpi", False)]
    assert scpi.chip == load_config(DEMO_CONFIG).chip
    result = run_cli("check-config", str(DEMO_CONFIG.with_name("demo-scpi.yaml")))
    assert result.returncode == 0 and "driver scpi, interlock watched" in result.stdout


def test_demo_scenario_has_the_promised_size() -> None:
    """Two 64-output, 32-input, 16-bit, 60 V boards; >= 96 actuators of both kinds; >= 40 monitors;
    some gates spanning both boards."""
    config = load_config(DEMO_CONFIG)
    assert [(b.outputs, b.monitor_inputs, b.dac_bits, b.full_scale_volts) for b in config.rack.boards] == [
        (64, 32, 16, 60.0),
        (64, 32, 16, 60.0),
    ]
    kinds = {a.kind for a in config.chip.actuators}
    assert len(config.chip.actuators) >= 96 and kinds == {"coupler", "phase"}
    assert len(config.chip.monitors) >= 40
    spanning = [
        g
        for g in config.chip.gates
        if config.chip.actuator(g.coupler).output.board != config.chip.actuator(g.phase).output.board
    ]
    assert spanning


def test_demo_calibration_is_labelled_design_nominal() -> None:
    """Until a calibration procedure exists, the demo tables say they are computed, not measured."""
    config = load_config(DEMO_CONFIG)
    origins = {load_calibration(a.calibration).origin for a in config.chip.actuators}
    assert origins == {"design-nominal"}


def test_check_config_prints_a_summary() -> None:
    """check-config of the demo exits 0 with boards, channels used and free, actuators by kind, monitors."""
    result = run_cli("check-config", str(DEMO_CONFIG))
    assert result.returncode == 0, result.stderr
    assert "actuators: 120 (60 coupler, 60 phase)" in result.stdout
    assert "monitors: 48" in result.stdout
    assert "outputs  60 used /   4 free" in result.stdout


def test_check_config_error_is_one_line_and_exit_2(tmp_path: Path) -> None:
    """A broken config gives exactly its located line on stderr, exit code 2, no traceback."""
    path = write_config(tmp_path, replace_line("      full_scale_volts: 60", "      full_scale_volt: 60"))
    result = run_cli("check-config", path.name, cwd=tmp_path)
    assert result.returncode == 2
    assert result.stderr.splitlines() == [
        "config.yaml:5: rack.boards[0].full_scale_volt: unknown key 'full_scale_volt' (did you mean 'full_scale_volts'?)"
    ]
    assert result.stdout == ""


@pytest.mark.parametrize("content", ["", "- just\n- a list\n", "\x00\x01binary", "rack: [unclosed\n"])
def test_check_config_never_shows_a_traceback(tmp_path: Path, content: str) -> None:
    """Empty, wrongly shaped, binary and broken files all give located lines and exit 2."""
    path = tmp_path / "bad.yaml"
    path.write_text(content, encoding="utf-8")
    result = run_cli("check-config", str(path))
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert all(line.count(":") >= 2 for line in result.stderr.splitlines()), result.stderr


def test_check_config_of_a_missing_file(tmp_path: Path) -> None:
    """A file that does not exist is one located line and exit 2."""
    result = run_cli("check-config", "nope.yaml", cwd=tmp_path)
    assert result.returncode == 2
    assert result.stderr.strip() == "nope.yaml:1: <top>: file not found: nope.yaml"


def test_usage_error_exits_2() -> None:
    """A command line missing its argument exits 2 without a traceback."""
    result = run_cli("check-config")
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
