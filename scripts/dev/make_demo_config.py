#!/usr/bin/env python3
"""Regenerate the demo scenario's configuration files (config/demo.yaml and config/demo/).

The demo is our own invented bench: two 64-output driver boards wired to a 16-mode test chip
with 8 columns of MEMS gates (60 gates, 120 actuators) and 48 monitor taps. The files are
committed; run this only when the scenario itself changes, then regenerate the nominal
calibration with `meshsim nominal-calibration`.
"""

from __future__ import annotations

from pathlib import Path

MODES = 16
COLUMNS = 8
TAP_AFTER = (1, 3, 7)  # after the 2nd, 4th and last column
ROOT = Path(__file__).resolve().parents[2] / "config"


def gates_by_column() -> list[list[tuple[int, int]]]:
    """(gate number, top mode) per column; even columns start at mode 0, odd ones at mode 1."""
    out, n = [], 0
    for col in range(COLUMNS):
        column = []
        for top in range(col % 2, MODES - 1, 2):
            column.append((n, top))
            n += 1
        out.append(column)
    return out


def wiring(n_gates: int) -> dict[str, tuple[str, int]]:
    """Actuator id -> (board, channel). Gates 28-31 have their coupler on b0 and phase on b1."""
    wire: dict[str, tuple[str, int]] = {}
    for g in range(28):
        wire[f"c{g:02d}"] = ("b0", 2 * g)
        wire[f"p{g:02d}"] = ("b0", 2 * g + 1)
    for i, g in enumerate(range(28, 32)):
        wire[f"c{g:02d}"] = ("b0", 56 + i)
        wire[f"p{g:02d}"] = ("b1", i)
    for g in range(32, n_gates):
        wire[f"c{g:02d}"] = ("b1", 4 + 2 * (g - 32))
        wire[f"p{g:02d}"] = ("b1", 5 + 2 * (g - 32))
    return wire


def main() -> None:
    columns = gates_by_column()
    n_gates = sum(len(c) for c in columns)
    wire = wiring(n_gates)
    (ROOT / "demo").mkdir(parents=True, exist_ok=True)

    (ROOT / "demo.yaml").write_text(
        "# The demo bench: two simulated driver boards and a 16-mode MEMS lattice test chip.\n"
        "# Our own invented scenario; every number here is a demo value, not a measurement.\n"
        "# The boards are reached through the simulator's in-process URL; for a real rack, replace\n"
        "# the urls (or run `meshwarden serve --ports-file` with the file `meshsim serve` writes).\n"
        "rack: !include demo/rack.yaml\n"
        "chip: !include demo/chip.yaml\n"
        "calibration:\n"
        "  directory: demo/calibration\n"
        "safety:\n"
        "  pull_in_margin: 0.15\n"
        "service:\n"
        "  bind: tcp://127.0.0.1:7640\n"
        "  pub: tcp://127.0.0.1:7641\n"
        "  telemetry_rate_hz: 2\n"
        "journal:\n"
        "  path: ../var/demo-journal.sqlite\n"
        "# Read only by the simulator (meshsim); the daemon ignores this section.\n"
        "simulator: !include demo/simulator.yaml\n",
        encoding="utf-8",
    )

    rack = ["# Two high-voltage driver boards: 64 outputs, 32 monitor inputs, 16-bit DACs, 60 V.", "boards:"]
    for board in ("b0", "b1"):
        rack += [
            f"  - id: {board}",
            f"    url: meshsim://demo/{board}?config={{config_dir}}/../demo.yaml",
            "    outputs: 64",
            "    monitor_inputs: 32",
            "    dac_bits: 16",
            "    full_scale_volts: 60 V",
            "    adc_bits: 16",
            "    monitor_gains_ohms: [1 kohm, 10 kohm, 100 kohm, 1 Mohm]",
            "    watchdog: {timeout_s: 30 s, action: ramp_to_zero}",
            "    timeout_s: 0.5 s",
            "    retries: 3",
        ]
    (ROOT / "demo" / "rack.yaml").write_text("\n".join(rack) + "\n", encoding="utf-8")

    chip = [
        "# The test chip: 60 gates (tunable coupler + phase shifter) in 8 columns over 16 modes.",
        "# Limits: couplers are parallel-plate actuators (nominal pull-in about 50 V); phase",
        "# shifters are comb drives (nominal lateral snap about 55 V). Design values, not measured.",
        "actuator_defaults:",
        "  coupler: {limit_volts: 42 V, pull_in_volts: 50 V, step_limit_volts: 2 V, dwell_s: 2 ms}",
        "  phase: {limit_volts: 44 V, pull_in_volts: 55 V, step_limit_volts: 4 V, dwell_s: 2 ms}",
        "actuators:",
    ]
    for g in range(n_gates):
        for kind, prefix in (("coupler", "c"), ("phase", "p")):
            aid = f"{prefix}{g:02d}"
            board, ch = wire[aid]
            chip.append(f"  - {{id: {aid}, kind: {kind}, output: '{board}:{ch}'}}")
    chip.append("gates:")
    for g in range(n_gates):
        chip.append(f"  - {{id: g{g:02d}, coupler: c{g:02d}, phase: p{g:02d}}}")
    chip += [
        "# dark_current_a: the detectors' datasheet dark current (demo value), taken out of every reading's watts",
        "monitor_defaults: {all: {responsivity_a_per_w: 0.9, transimpedance_ohms: 100 kohm, dark_current_a: 5 nA}}",
        "monitors:",
    ]
    taps = []
    for i, (after, mode) in enumerate((a, m) for a in TAP_AFTER for m in range(MODES)):
        board, index = ("b0", i) if i < 32 else ("b1", i - 32)
        chip.append(f"  - {{id: m{i:02d}, input: '{board}:{index}'}}")
        taps.append((f"m{i:02d}", after, mode))
    columns = gates_by_column()
    chip += [
        "",
        "# Where the gates and monitor taps sit (the chip's design); calibration routes light with it.",
        "# A gate at top mode k couples modes k and k+1, then its phase shifter acts on mode k; a tap",
        "# [after, mode] sees that mode after that column. Light enters at input_modes.",
        "lattice:",
        f"  modes: {MODES}",
        "  input_modes: [0]",
        "  columns:",
        *("    - {" + ", ".join(f"g{n:02d}: {top}" for n, top in column) + "}" for column in columns),
        "  taps:   # monitor: [after column, mode]",
        *(f"    {mid}: [{after}, {mode}]" for mid, after, mode in taps),
    ]
    (ROOT / "demo" / "chip.yaml").write_text("\n".join(chip) + "\n", encoding="utf-8")

    sim = [
        "# Physics of the simulated demo chip (read only by meshsim). Units are in the key names.",
        "# Invented demo values chosen to sit in the ranges of shared/PHYSICS.md.",
        "seed: 20261202",
        "laser: {wavelength_nm: 1550, power_mw: 1.0, input_modes: [0]}",
        "coupler:",
        "  spring_n_per_m: 27.7",
        "  air_gap_um: 3.0",
        "  dielectric_nm: 100",
        "  dielectric_eps_r: 7.5",
        "  area_um2: 10000",
        "  resonance_khz: 500",
        "  quality_factor: 50",
        "  optical_gap_rest_nm: 700",
        "  coupling_length_um: 20",
        "  coupling_ref_per_um: 0.0785398",
        "  coupling_ref_gap_nm: 365",
        "  coupling_decay_nm: 113",
        "  loss_db: 0.15",
        "  charging_fraction: 0.02",
        "  charging_time_s: 300",
        "  stiction_probability: 0.3",
        "phase:",
        "  fingers: 100",
        "  thickness_um: 10",
        "  finger_gap_um: 2",
        "  spring_n_per_m: 7.0",
        "  resonance_khz: 500",
        "  quality_factor: 200",
        "  lateral_snap_volts: 55",
        "  optical_gap_rest_nm: 1300",
        "  index_shift_contact: 0.031",
        "  index_decay_nm: 250",
        "  length_um: 200",
        "  loss_db: 0.2",
        "  loss_db_per_rad: 0.006     # the arm loses 0.038 dB more at 2 pi of actuated phase",
        "  charging_fraction: 0.005",
        "  charging_time_s: 600",
        "  stiction_probability: 0.3",
        "spread:",
        "  spring_rel: 0.03",
        "  gap_rel: 0.02",
        "  optical_gap_rel: 0.01",
        "  static_phase_span_rad: 6.283185   # each arm's phase at rest: uniform in [0, 2 pi)",
        "  splitting_angle_rad: 0.03         # sigma of each coupler's splitting-angle error",
        "# a neighbour's V^2 acting on an actuator: within a gate, and between side-by-side gates",
        "crosstalk: {within_gate_fraction: 0.02, adjacent_gate_fraction: 0.01}",
        "drift:",
        "  random_walk_rad_per_sqrt_s: 0.02  # per arm: 0.15 rad rms after a minute, 0.35 after five",
        "  temperature_steps: []             # [[at_s, rad], ...]: scheduled steps of every arm alike",
        "  temperature_step_interval_s: 1800 # random steps, on average every half hour ...",
        "  temperature_step_rad: 0.2         # ... of 0.2 rad rms",
        "detectors: {quantum_efficiency: 0.72, dark_current_na: 5, temperature_k: 300, adc_full_scale_volts: 2.5}",
        "board: {model: MW-HVD64-SIM, firmware: [1, 0, 0], watchdog_ramp_volts_per_s: 20, sense_noise_mv: 2}",
        "lattice:",
        f"  modes: {MODES}",
        "  tap_fraction: 0.01",
        "  transition_loss_db: 0.05",
        "  columns:",
    ]
    for column in columns:
        sim.append("    - {" + ", ".join(f"g{n:02d}: {top}" for n, top in column) + "}")
    sim.append("  taps:   # monitor: [after column, mode]")
    for mid, after, mode in taps:
        sim.append(f"    {mid}: [{after}, {mode}]")
    (ROOT / "demo" / "simulator.yaml").write_text("\n".join(sim) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
