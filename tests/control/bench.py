"""A small bench configuration written into a temporary folder: one board, two gates, two monitors,
with a simulator section of an ideal chip (every imperfection set to 0), design-nominal
calibration generated from the simulator's model."""

from __future__ import annotations

import itertools
from pathlib import Path

from meshsim.nominal import write_nominal_tables
from meshsim.params import parse_params
from meshsim.scenario import load_scenario
from meshwarden.config.model import MIN_PULL_IN_MARGIN

_names = itertools.count()

BENCH = """\
rack:
  boards:
    - id: b0
      url: "meshsim://{rack}/b0?config={{config_dir}}/bench.yaml"
      outputs: 16
      monitor_inputs: 8
      watchdog: {{timeout_s: {watchdog_s}, action: ramp_to_zero}}
      timeout_s: {timeout_s}
      retries: {retries}
      error_rate_limit: {error_rate_limit}
chip:
  actuator_defaults:
    coupler: {{limit_volts: {coupler_limit}, pull_in_volts: {coupler_pull_in}, step_limit_volts: 2, dwell_s: {dwell}}}
    phase: {{limit_volts: 44, pull_in_volts: 55, step_limit_volts: 4, dwell_s: {dwell}}}
  actuators:
    - {{id: c0, kind: coupler, output: "b0:0"}}
    - {{id: p0, kind: phase, output: "b0:1"}}
    - {{id: c1, kind: coupler, output: "b0:4"}}
    - {{id: p1, kind: phase, output: "b0:5"}}
  gates:
    - {{id: g0, coupler: c0, phase: p0}}
    - {{id: g1, coupler: c1, phase: p1}}
  monitor_defaults: {{all: {{responsivity_a_per_w: 0.9, transimpedance_ohms: 100 kohm}}}}
  monitors:
    - {{id: m0, input: "b0:0"}}
    - {{id: m1, input: "b0:1"}}
  lattice:
    modes: 2
    input_modes: [0]
    columns:
      - {{g0: 0}}
      - {{g1: 0}}
    taps: {{m0: [1, 0], m1: [1, 1]}}
calibration:
  directory: cal
safety:
  pull_in_margin: {margin}
journal:
  path: journal.sqlite
simulator:
  seed: 5
  laser: {{wavelength_nm: 1550, power_mw: 1.0, input_modes: [0]}}
  coupler: {{quality_factor: {coupler_q}, stiction_probability: 0.0}}
  phase: {{stiction_probability: 0.0, loss_db_per_rad: 0.0}}
  # an ideal chip: no fabrication spread or errors, no crosstalk, no drift
  spread: {{spring_rel: 0.0, gap_rel: 0.0, optical_gap_rel: 0.0, static_phase_span_rad: 0.0, splitting_angle_rad: 0.0}}
  crosstalk: {{within_gate_fraction: {within_gate}, adjacent_gate_fraction: 0.0}}
  drift: {{random_walk_rad_per_sqrt_s: 0.0}}
  lattice:
    modes: 2
    tap_fraction: 0.01
    columns:
      - {{g0: 0}}
      - {{g1: 0}}
    taps: {{m0: [1, 0], m1: [1, 1]}}
"""

DEFAULTS = dict(
    watchdog_s=30,
    timeout_s=0.2,
    retries=4,
    error_rate_limit=0.5,
    coupler_limit=40,
    coupler_pull_in=50,
    dwell="2 ms",
    margin=0.15,
    coupler_q=50,
    within_gate=0.0,
)


def write_bench(folder: Path, **changes: object) -> tuple[Path, str]:
    """Write the bench config (and its calibration) into ``folder``; return its path and rack name."""
    rack = f"bench{next(_names)}"
    values = {**DEFAULTS, **changes, "rack": rack}
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "bench.yaml"
    text = BENCH.format(**values)
    if float(values["margin"]) < MIN_PULL_IN_MARGIN:  # a thin margin must say what it relies on
        text = text.replace(
            f"  pull_in_margin: {values['margin']}\n",
            f"  pull_in_margin: {values['margin']}\n"
            "  margin_override: {measured_pull_in: the simulated chip's own pull-in, reason: guard test}\n",
        )
    path.write_text(text, encoding="utf-8")
    scenario = load_scenario(path)
    write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
    return path, rack
