"""The soak harness, short: random sequences against the daemon process and a pty-served rack,
with a kill -9 mid-ramp, checked at the boards; and the checker it relies on, on known logs."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

from meshwarden.config import load_config
from meshwarden.writelog import check_board_log
from tests.conftest import REPO
from tests.control.bench import write_bench


def _soak_module():  # scripts/ is not a package: load the harness by path
    spec = importlib.util.spec_from_file_location("soak", REPO / "scripts" / "soak.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules["soak"] = module  # its dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
def test_a_short_soak_breaks_no_rule_at_the_boards() -> None:
    """Six random sequences and two kill -9 restarts mid-ramp: writes were checked, none broke a rule."""
    result = _soak_module().run_soak(sequences=6, seed=11, restart_every=3)
    assert result["writes_checked"] > 50
    assert result["restarts"] >= 2
    assert result["violations"] == 0, result["first_violations"]


def test_the_checker_catches_each_kind_of_violation(tmp_path: Path) -> None:
    """On hand-made logs for the bench (c0: 40 V limit, 2 V steps, 2 ms dwell; output 2 unwired;
    LSB = 60 V / 65536, common practice for a 16-bit DAC): a code over the ceiling, a step over
    the limit, a change inside the dwell, a write on an unwired output and a write inside a
    start-up window are each reported; a clean ramp is not."""
    path, _ = write_bench(tmp_path)
    config = load_config(path)
    lsb = 60.0 / 65536
    code = lambda volts: round(volts / lsb)  # noqa: E731
    clean = [(0.0, "boot", 0, ()), (1.0, "write", 0, (code(1.9),)), (1.01, "write", 0, (code(3.8),))]
    assert check_board_log(config, "b0", clean).violations == []
    bad = [
        (1.0, "write", 0, (code(1.9),)),
        (1.0005, "write", 0, (code(3.0),)),  # 0.5 ms later: inside the dwell
        (1.1, "write", 0, (code(6.0),)),  # a 3 V step
        (1.2, "zero", 0, ()),
        (1.3, "write", 2, (5,)),  # unwired
        (1.4, "write", 1, (code(45.0),)),  # p0 above 44 V... and a 45 V step
    ]
    rules = sorted(v.rule for v in check_board_log(config, "b0", bad, no_write_windows=[(1.25, 1.35)]).violations)
    assert rules == ["1", "1", "2", "2", "2", "5"]
