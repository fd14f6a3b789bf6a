"""A small valid configuration written into a temporary folder, for tests to break one line of."""

from __future__ import annotations

from pathlib import Path

MAIN = """\
rack:
  boards:
    - id: b0
      url: socket://127.0.0.1:9
      full_scale_volts: 60
chip:
  actuators:
    - {id: c0, kind: coupler, output: "b0:0", limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 0.002}
    - {id: p0, kind: phase, output: "b0:1", limit_volts: 40, pull_in_volts: 55, step_limit_volts: 4, dwell_s: 0.002}
  gates:
    - {id: g0, coupler: c0, phase: p0}
  monitors:
    - {id: m0, input: "b0:0", responsivity_a_per_w: 0.9, transimpedance_ohms: 100000}
calibration:
  directory: cal
journal:
  path: journal.sqlite
"""

CAL = """\
format: meshwarden-calibration/1
actuator: {id}
kind: {kind}
version: test-1
origin: measured
volts: [0.0, 10.0, 20.0, 30.0, 40.0]
values: {values}
"""

VALUES = {"coupler": "[0.0, 0.1, 0.3, 0.6, 0.9]", "phase": "[0.0, 0.5, 1.5, 3.5, 7.0]"}


def write_cal(folder: Path, actuator: str, kind: str, values: str | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{actuator}.yaml"
    path.write_text(CAL.format(id=actuator, kind=kind, values=values or VALUES[kind]), encoding="utf-8")
    return path


def write_config(folder: Path, text: str = MAIN, name: str = "config.yaml") -> Path:
    """Write ``text`` as the top file plus calibration for c0, p0, c1, p1; return its path."""
    for actuator, kind in (("c0", "coupler"), ("p0", "phase"), ("c1", "coupler"), ("p1", "phase")):
        write_cal(folder / "cal", actuator, kind)
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def replace_line(old: str, new: str, text: str = MAIN) -> str:
    assert old in text, old
    return text.replace(old, new, 1)
