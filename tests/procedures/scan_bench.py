"""A scan bench: one board, five Mach-Zehnder blocks of two gates on an ideal simulated chip.

Block i uses modes 2i and 2i+1; light enters mode 2i. Gate ``a{i}`` (column 0) splits it, its
phase shifter sets the interferometer's phase, gate ``b{i}`` (column 1) recombines; monitors
``o{i}t``/``o{i}b`` tap both outputs after column 1, and ``d{i}`` taps the unlit input mode
2i+1 (a dark reference). The phase shifter of ``b{i}`` sits after the last coupler: no monitor
can see it (a deliberate unobservable actuator). Every imperfection of the simulator is off.
"""

from __future__ import annotations

import itertools
from pathlib import Path

from meshsim.nominal import write_nominal_tables
from meshsim.params import parse_params
from meshsim.scenario import load_scenario
from meshwarden.procedures.lattice import LatticeTopology

BLOCKS = 5
_names = itertools.count()


def _lines(rack: str, time_scale: float) -> str:
    actuators, gates, monitors, taps = [], [], [], []
    col0, col1 = [], []
    channel = 0
    for i in range(BLOCKS):
        for gate, column in ((f"a{i}", col0), (f"b{i}", col1)):
            actuators.append(f'    - {{id: {gate}c, kind: coupler, output: "b0:{channel}"}}')
            actuators.append(f'    - {{id: {gate}p, kind: phase, output: "b0:{channel + 1}"}}')
            gates.append(f"    - {{id: {gate}, coupler: {gate}c, phase: {gate}p}}")
            column.append(f"{gate}: {2 * i}")
            channel += 2
        for k, (name, spot) in enumerate(
            ((f"o{i}t", f"[1, {2 * i}]"), (f"o{i}b", f"[1, {2 * i + 1}]"), (f"d{i}", f"[-1, {2 * i + 1}]"))
        ):
            monitors.append(f'    - {{id: {name}, input: "b0:{3 * i + k}"}}')
            taps.append(f"{name}: {spot}")
    inputs = ", ".join(str(2 * i) for i in range(BLOCKS))
    return f"""\
rack:
  boards:
    - id: b0
      url: "meshsim://{rack}/b0?config={{config_dir}}/bench.yaml&time_scale={time_scale}"
      outputs: 32
      monitor_inputs: 16
      watchdog: {{timeout_s: 30, action: ramp_to_zero}}
      timeout_s: 0.2
      retries: 4
chip:
  actuator_defaults:
    coupler: {{limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 2 ms}}
    phase: {{limit_volts: 44, pull_in_volts: 55, step_limit_volts: 4, dwell_s: 2 ms}}
  actuators:
{chr(10).join(actuators)}
  gates:
{chr(10).join(gates)}
  monitor_defaults: {{all: {{responsivity_a_per_w: 0.9, transimpedance_ohms: 100 kohm}}}}
  monitors:
{chr(10).join(monitors)}
calibration:
  directory: cal
journal:
  path: journal.sqlite
simulator:
  seed: 11
  laser: {{wavelength_nm: 1550, power_mw: 1.0, input_modes: [{inputs}]}}
  coupler: {{stiction_probability: 0.0}}
  phase: {{stiction_probability: 0.0, loss_db_per_rad: 0.0}}
  spread: {{spring_rel: 0.0, gap_rel: 0.0, optical_gap_rel: 0.0, static_phase_span_rad: 0.0, splitting_angle_rad: 0.0}}
  crosstalk: {{within_gate_fraction: 0.0, adjacent_gate_fraction: 0.0}}
  drift: {{random_walk_rad_per_sqrt_s: 0.0}}
  lattice:
    modes: {2 * BLOCKS}
    tap_fraction: 0.01
    columns:
      - {{{", ".join(col0)}}}
      - {{{", ".join(col1)}}}
    taps: {{{", ".join(taps)}}}
"""


def write_scan_bench(folder: Path, time_scale: float = 1.0, extra: str = "") -> tuple[Path, str]:
    """Write the bench (and its design-nominal calibration) into ``folder``; return its path and rack name."""
    rack = f"scanbench{next(_names)}"
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "bench.yaml"
    path.write_text(_lines(rack, time_scale) + extra, encoding="utf-8")
    scenario = load_scenario(path)
    write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
    return path, rack


def bench_topology() -> LatticeTopology:
    """The bench's lattice, as the test (not the daemon) knows it."""
    gates = {f"a{i}": (0, 2 * i) for i in range(BLOCKS)} | {f"b{i}": (1, 2 * i) for i in range(BLOCKS)}
    taps = {}
    for i in range(BLOCKS):
        taps |= {f"o{i}t": (1, 2 * i), f"o{i}b": (1, 2 * i + 1), f"d{i}": (-1, 2 * i + 1)}
    return LatticeTopology(2 * BLOCKS, gates, taps, tuple(2 * i for i in range(BLOCKS)))


# The operating point every scan test starts from: a generic interferometer setting, so that
# every coupler and every phase before a coupler has a first-order effect on the outputs.
OPERATING_POINT = {f"a{i}.kappa": 0.3 for i in range(BLOCKS)} | {f"b{i}.kappa": 0.6 for i in range(BLOCKS)}
OPERATING_POINT |= {f"a{i}.phase": 2.0 for i in range(BLOCKS)} | {f"b{i}.phase": 0.5 for i in range(BLOCKS)}
