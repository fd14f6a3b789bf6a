"""A lock bench written into a temporary folder: eight Mach-Zehnder interferometers side by side on
one board (column 0 splits, column 1 combines, taps on both outputs), with drift switched on.

The chip keeps the imperfections a lock must live with: a random static phase per arm (so the
table's absolute phase means nothing), crosstalk between neighbouring phase shifters, charging,
phase-dependent loss, random-walk drift and temperature steps. The couplers' fabrication spread and
splitting error and the crosstalk within a gate (a phase shifter's V^2 pulling its own coupler)
are 0, so the interferometers' couplers sit at 50:50 and reach a deep null: the extinction a
minimum lock reaches is then set by the lock, not by unequal couplers. ``phase_table_scale``
scales every phase table's values, so a test can hand the lock a calibration whose slope is off.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import yaml

from meshsim.nominal import write_nominal_tables
from meshsim.params import parse_params
from meshsim.scenario import load_scenario

_names = itertools.count()
MZIS = 8

HEAD = """\
rack:
  boards:
    - id: b0
      url: "meshsim://{rack}/b0?config={{config_dir}}/lockbench.yaml&time_scale={time_scale}"
      outputs: 32
      monitor_inputs: 16
      watchdog: {{timeout_s: 600, action: ramp_to_zero}}
      timeout_s: 0.5
      retries: 3
chip:
  actuator_defaults:
    coupler: {{limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: {dwell}}}
    phase: {{limit_volts: 44, pull_in_volts: 55, step_limit_volts: 4, dwell_s: {dwell}}}
  actuators:
{actuators}
  gates:
{gates}
  monitor_defaults: {{all: {{responsivity_a_per_w: 0.9, transimpedance_ohms: 100 kohm}}}}
  monitors:
{monitors}
calibration:
  directory: cal
safety:
  pull_in_margin: 0.15
journal:
  path: journal.sqlite
simulator:
  seed: {seed}
  laser: {{wavelength_nm: 1550, power_mw: 8.0, input_modes: [0, 2, 4, 6, 8, 10, 12, 14]}}
  coupler: {{stiction_probability: 0.0}}
  phase: {{stiction_probability: 0.0}}
  spread: {{spring_rel: 0.0, gap_rel: 0.0, optical_gap_rel: 0.0, splitting_angle_rad: 0.0}}
  crosstalk: {{within_gate_fraction: 0.0, adjacent_gate_fraction: 0.01}}
  drift: {{random_walk_rad_per_sqrt_s: {drift}, temperature_steps: {steps}, temperature_step_interval_s: 0}}
  lattice:
    modes: 16
    tap_fraction: 0.01
    columns:
      - {{{split}}}
      - {{{combine}}}
    taps: {{{taps}}}
"""


def write_lock_bench(
    folder: Path,
    *,
    drift: float = 0.05,
    steps: str = "[]",
    time_scale: float = 1.0,
    seed: int = 11,
    dwell: str = "2 ms",
    phase_table_scale: float = 1.0,
) -> tuple[Path, str]:
    """Write the lock bench (and its nominal calibration) into ``folder``; return its path and rack name.
    MZI i: splitter gate s{i} (c{i}, p{i}: the locked phase), combiner gate k{i} (d{i}, q{i}), taps
    m{2i} (bar side) and m{2i+1}."""
    rack = f"lockbench{next(_names)}"
    actuators, gates, monitors = [], [], []
    for i in range(MZIS):
        for j, name in enumerate((f"c{i}", f"p{i}", f"d{i}", f"q{i}")):
            kind = "coupler" if name[0] in "cd" else "phase"
            actuators.append(f"    - {{id: {name}, kind: {kind}, output: 'b0:{4 * i + j}'}}")
        gates.append(f"    - {{id: s{i}, coupler: c{i}, phase: p{i}}}")
        gates.append(f"    - {{id: k{i}, coupler: d{i}, phase: q{i}}}")
    for m in range(2 * MZIS):
        monitors.append(f"    - {{id: m{m:02d}, input: 'b0:{m}'}}")
    text = HEAD.format(
        rack=rack,
        time_scale=time_scale,
        dwell=dwell,
        actuators="\n".join(actuators),
        gates="\n".join(gates),
        monitors="\n".join(monitors),
        seed=seed,
        drift=drift,
        steps=steps,
        split=", ".join(f"s{i}: {2 * i}" for i in range(MZIS)),
        combine=", ".join(f"k{i}: {2 * i}" for i in range(MZIS)),
        taps=", ".join(f"m{m:02d}: [1, {m}]" for m in range(2 * MZIS)),
    )
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "lockbench.yaml"
    path.write_text(text, encoding="utf-8")
    scenario = load_scenario(path)
    write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
    if phase_table_scale != 1.0:
        for table in (folder / "cal").glob("[pq]*.yaml"):
            data = yaml.safe_load(table.read_text(encoding="utf-8"))
            data["values"] = [v * phase_table_scale for v in data["values"]]
            table.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path, rack
