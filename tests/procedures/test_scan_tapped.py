"""Judging a silent actuator from the taps of the coupler where it acts: the fringe algebra and the tap paths,
checked against an independent coherent field model (numpy)."""

from __future__ import annotations

import asyncio
import math
from pathlib import Path

import numpy as np
import pytest

from meshsim.faults import Fault
from meshwarden.procedures.inputs import ProcedureInputError
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_attribution import coupling_angle, mixer_phase_sigmas, offset_fringe_sigmas
from meshwarden.procedures.scan_paths import clean_tap, input_readings, tapped_outputs
from tests.procedures.scan_bench import bench_topology
from tests.procedures.test_scan import _custom, _demo_topology, _mode_powers, _tap_powers


def _coupler(theta: float) -> np.ndarray:
    """The lossless directional coupler of coupled-mode theory with kappa = sin^2(theta / 2) (Yariv, IEEE JQE 9:919,
    1973): [[cos, i sin], [i sin, cos]] of half the angle."""
    c, s = math.cos(theta / 2), math.sin(theta / 2)
    return np.array([[c, 1j * s], [1j * s, c]])


def _outputs(theta: float, a_w: float, b_w: float, psi: float) -> tuple[float, float]:
    """Output powers of the coupler for coherent inputs of powers A, B and relative phase psi."""
    out = _coupler(theta) @ np.array([math.sqrt(a_w), math.sqrt(b_w) * np.exp(1j * psi)])
    return float(abs(out[0]) ** 2), float(abs(out[1]) ** 2)


def test_coupling_angle_is_the_coupled_mode_angle() -> None:
    """kappa = sin^2(C L) (Yariv 1973): the power a coupler of angle coupling_angle(kappa) sends across is kappa."""
    for kappa in (0.0, 0.01, 0.3, 0.5, 0.85, 1.0):
        # Source: Yariv 1973, the cross element of the coupler matrix carries sin^2 of the coupled-mode angle
        assert abs(_coupler(coupling_angle(kappa))[1, 0]) ** 2 == pytest.approx(kappa, abs=1e-12)


def test_coupler_fringe_has_the_two_beam_form() -> None:
    """With light in both inputs the top output is (A+B)/2 + R cos(theta - alpha) with R^2 = ((A-B)/2)^2 + A B
    sin^2(psi) (directional-coupler algebra recomputed here from the Yariv 1973 matrix): so half the outputs'
    difference is where on that fringe the coupler sits."""
    rng = np.random.default_rng(3)
    for _ in range(200):
        a_w, b_w, psi = rng.uniform(0, 1), rng.uniform(0, 1), rng.uniform(0, 2 * math.pi)
        thetas = np.linspace(0, 2 * math.pi, 721)
        tops = np.array([_outputs(t, a_w, b_w, psi)[0] for t in thetas])
        radius = math.sqrt(((a_w - b_w) / 2) ** 2 + a_w * b_w * math.sin(psi) ** 2)
        assert tops.max() == pytest.approx((a_w + b_w) / 2 + radius, abs=1e-5)
        assert tops.min() == pytest.approx((a_w + b_w) / 2 - radius, abs=1e-5)


@pytest.mark.parametrize(
    "looks",
    [
        [(0.5, 0.0, 1.0), (1.0, 0.0, 1.0)],
        [(-0.15, 0.0, 1.0), (-0.3, 0.0, 2.0)],
        [(0.01, 0.0, 0.1), (0.6, 0.0, 1.0)],
        [(0.3, 0.01, 1.0), (0.6, 0.05, 1.0)],
    ],
)
def test_offset_fringe_bound_holds_and_is_reached_on_real_couplers(looks: list[tuple[float, float, float]]) -> None:
    """Over real couplers (the Yariv 1973 matrix, numpy) at any angle and input light, a turn by each look's step
    changes the top output by at least offset_fringe_sigmas(|D|) sigma in one look, D = half the outputs'
    difference, after taking off what another cause could give each look; and some coupler shows no more than that
    (the bound is tight)."""
    bound = offset_fringe_sigmas(1.0, looks)
    assert bound > 0.0
    rng = np.random.default_rng(11)
    ratios = []
    for _ in range(3000):
        a_w, b_w, psi = rng.uniform(0, 1), rng.uniform(0, 1), rng.uniform(0, 2 * math.pi)
        theta = rng.uniform(0, 2 * math.pi)
        top, bottom = _outputs(theta, a_w, b_w, psi)
        offset = abs(top - bottom) / 2
        shown = max((abs(_outputs(theta + s, a_w, b_w, psi)[0] - top) - o * offset) / sg for s, o, sg in looks)
        assert shown >= offset * bound - 1e-9
        if offset > 1e-3:
            ratios.append(shown / offset)
    # one input only: a dense sweep of the angle passes every point of the fringe, the least favourable one too
    for theta in np.linspace(0, 2 * math.pi, 20001):
        top, bottom = _outputs(theta, 1.0, 0.0, 0.0)
        offset = abs(top - bottom) / 2
        if offset > 1e-3:
            changes = [(abs(_outputs(theta + s, 1.0, 0.0, 0.0)[0] - top) - o * offset) / sg for s, o, sg in looks]
            ratios.append(max(changes) / offset)
    assert min(ratios) == pytest.approx(bound, rel=0.02)


def test_one_look_or_none_guarantees_nothing() -> None:
    """A single turn has a blind point at every offset (the fringe's change crosses zero), and no look shows
    nothing; a sigma of zero is refused."""
    assert offset_fringe_sigmas(1.0, [(0.3, 0.0, 1.0)]) == pytest.approx(0.0, abs=1e-12)
    assert offset_fringe_sigmas(1.0, []) == 0.0
    with pytest.raises(ProcedureInputError, match="sigma"):
        offset_fringe_sigmas(1.0, [(0.3, 0.0, 0.0)])


def test_tapped_outputs_read_the_coupler_outputs_in_a_field_model() -> None:
    """Where tapped_outputs names a coupler and two taps, those taps read that coupler's two output powers whatever
        the rest of the demo lattice does (coherent fields through unitary couplers, numpy, light entering its input
    mode), so a move of the actuator
        changes them by equal and opposite amounts; a gate's own phase never moves them."""
    topology = _demo_topology()
    rng = np.random.default_rng(17)
    cases = [(g, a) for g in sorted(topology.gates) for a in ("kappa", "phase")]
    named = seen = 0
    for gate, attribute in cases:
        kappas = {g: float(rng.uniform(0.1, 0.9)) for g in topology.gates}
        found = tapped_outputs(topology, kappas, gate, attribute)
        if found is None:
            continue
        named += 1
        effect, upper, lower = found
        phases = {g: float(rng.uniform(0, 2 * math.pi)) for g in topology.gates}
        light = np.zeros(topology.modes, dtype=complex)
        light[list(topology.input_modes)] = rng.normal(size=len(topology.input_modes)) + 1j
        before = _tap_powers(topology, kappas, phases, light)
        if attribute == "kappa":
            moved = _tap_powers(topology, kappas | {gate: kappas[gate] + 0.05}, phases, light)
        else:
            moved = _tap_powers(topology, kappas, phases | {gate: phases[gate] + 0.3}, light)
        own_phase = _tap_powers(topology, kappas, phases | {effect: phases[effect] + 0.7}, light)
        assert moved[upper] - before[upper] == pytest.approx(-(moved[lower] - before[lower]), abs=1e-9)
        if attribute == "kappa" and before[upper] + before[lower] > 1e-3:  # light enters it: its move shows
            assert abs(moved[upper] - before[upper]) > 1e-6
            seen += 1
        # the taps hold all of the coupler's light: its own phase (after it) changes neither
        assert own_phase[upper] == pytest.approx(before[upper], abs=1e-9)
        assert own_phase[lower] == pytest.approx(before[lower], abs=1e-9)
    assert named >= 20 and seen >= 5


def test_clean_tap_stops_at_the_first_gate() -> None:
    """A tap right after the column, or after later columns where no gate touches the mode, reads it; a gate first
    means none (the demo layout: taps after columns 1, 3 and 7, mode 0 ungated in odd columns)."""
    topology = _demo_topology()
    assert clean_tap(topology, 1, 4) == "m04"
    assert clean_tap(topology, 2, 0) == "m16"  # mode 0 passes column 3 untouched
    assert clean_tap(topology, 2, 1) is None  # mode 1 meets gate g23 in column 3 first
    assert clean_tap(topology, 4, 3) is None


def test_phase_fringe_at_its_mixing_coupler_has_amplitude_sqrt_ab_sin_theta() -> None:
    """A phase turning psi at a coupler of ratio kappa moves its top output by sqrt(A B) sin(theta) times a sine of
    psi, sin(theta) = 2 sqrt(kappa (1 - kappa)) (recomputed here from the Yariv 1973 matrix by sweeping psi)."""
    rng = np.random.default_rng(23)
    for _ in range(100):
        a_w, b_w, kappa = rng.uniform(0, 1), rng.uniform(0, 1), rng.uniform(0.05, 0.95)
        theta = coupling_angle(kappa)
        tops = [_outputs(theta, a_w, b_w, psi)[0] for psi in np.linspace(0, 2 * math.pi, 721)]
        half_swing = (max(tops) - min(tops)) / 2
        assert half_swing == pytest.approx(math.sqrt(a_w * b_w) * 2 * math.sqrt(kappa * (1 - kappa)), abs=1e-5)


def test_input_readings_read_a_couplers_inputs_and_outputs_in_a_field_model() -> None:
    """Where input_readings names a coupler, its input taps read the light entering it, and each output reading's
    taps change by exactly what that output gains or loses when the actuator moves (coherent fields through the
    demo lattice, numpy, light entering its input mode; a lossless gate keeps the sum of its outputs)."""
    topology = _demo_topology()
    rng = np.random.default_rng(29)
    named = 0
    for gate, attribute in [(g, a) for g in sorted(topology.gates) for a in ("kappa", "phase")]:
        kappas = {g: float(rng.uniform(0.1, 0.9)) for g in topology.gates}
        found = input_readings(topology, kappas, gate, attribute)
        if found is None:
            continue
        named += 1
        phases = {g: float(rng.uniform(0, 2 * math.pi)) for g in topology.gates}
        light = np.zeros(topology.modes, dtype=complex)
        light[list(topology.input_modes)] = 1.0
        column, top = topology.gates[found.effect]
        before = _tap_powers(topology, kappas, phases, light)
        entering = _mode_powers(topology, kappas, phases, column)
        assert before[found.inputs[0]] == pytest.approx(entering[top], abs=1e-12)
        assert before[found.inputs[1]] == pytest.approx(entering[top + 1], abs=1e-12)
        if attribute == "kappa":
            moved_k, moved_p = kappas | {gate: kappas[gate] + 0.05}, phases
        else:
            moved_k, moved_p = kappas, phases | {gate: phases[gate] + 0.4}
        after = _tap_powers(topology, moved_k, moved_p, light)
        out_before = _mode_powers(topology, kappas, phases, column + 1)
        out_after = _mode_powers(topology, moved_k, moved_p, column + 1)
        for mode, reading in zip((top, top + 1), found.outputs, strict=True):
            change = sum(after[t] - before[t] for t in reading.taps)
            assert change == pytest.approx(out_after[mode] - out_before[mode], abs=1e-12)
    assert named >= 5


def test_output_reading_is_refused_when_both_outputs_enter_one_gate() -> None:
    """Two gates in a row on the same modes: the second's outputs hold all of the first's light, so their sum never
    changes and cannot read it; no reading is offered."""
    topology = LatticeTopology(
        2, {"g0": (0, 0), "g1": (1, 0)}, {"m0": (-1, 0), "m1": (-1, 1), "t0": (1, 0), "t1": (1, 1)}, (0, 1)
    )
    assert input_readings(topology, {"g0": 0.5, "g1": 0.5}, "g0", "kappa") is None


def test_a_stuck_coupler_with_tapped_outputs_is_found_from_its_taps(tmp_path: Path) -> None:
    """On the bench, a stuck recombining coupler (both outputs tapped) is no_response on the evidence of its own
    taps - a working one would have shown at least twice k sigma in one look - within rules 1-3; the same coupler
    working is ok."""
    stuck = [Fault("stuck", "b1c")]
    report, issues = asyncio.run(_custom(tmp_path / "stuck", stuck, topology=bench_topology(), measured_tables=True))
    assert issues == []
    verdict = report["actuators"]["b1c"]
    assert verdict["verdict"] == "no_response", verdict
    assert "the taps of both outputs" in verdict["reason"]
    assert verdict["evidence"]["tapped_sigmas"] >= 10.0
    healthy, issues = asyncio.run(_custom(tmp_path / "healthy", [], topology=bench_topology(), measured_tables=True))
    assert issues == []
    assert healthy["actuators"]["b1c"]["verdict"] == "ok"


def test_the_taps_judge_a_silent_actuator_only_through_tables_measured_on_the_chip(tmp_path: Path) -> None:
    """The same stuck coupler with the design-nominal tables in force is not judged from its taps: a design table
    may be far off a real chip (on the demo chip up to 0.5 in kappa), and that bound needs the coupling and the
    step as they are. (Here its light has not interfered upstream, so the plain rule still finds it; never ok.)"""
    report, issues = asyncio.run(_custom(tmp_path, [Fault("stuck", "b1c")], topology=bench_topology()))
    assert issues == []
    verdict = report["actuators"]["b1c"]
    assert "tapped_sigmas" not in verdict["evidence"] and "the taps of both outputs" not in verdict["reason"]
    assert verdict["verdict"] != "ok", verdict


def test_mixer_phase_bound_holds_on_real_couplers_and_vanishes_for_one_input() -> None:
    """Over real couplers (the Yariv 1973 matrix, numpy) with any input light, ratio and phase, a phase step by each
    look's size changes the top output by at least mixer_phase_sigmas of its outputs in one look, and not far more
    at worst (within 20 %); when all the light enters one input, which the outputs cannot rule out, it is 0."""
    looks = [(0.01, 0.0, 1e-3), (0.7, 0.002, 1e-2), (1.4, 0.0, 1e-2)]
    rng = np.random.default_rng(31)
    ratios = []
    for i in range(1500):
        a_w, b_w, psi, kappa = rng.uniform(0, 1), rng.uniform(0, 1), rng.uniform(0, 2 * math.pi), rng.uniform(0.1, 0.9)
        if i % 4 == 0:
            b_w = a_w * 10 ** rng.uniform(-8, -2)  # nearly all the light in one input
        theta = coupling_angle(kappa)
        top, bottom = _outputs(theta, a_w, b_w, psi)
        bound = mixer_phase_sigmas((top - bottom) / 2, top + bottom, [kappa], looks)
        for sign in (1.0, -1.0):
            shown = max(
                (abs(_outputs(theta, a_w, b_w, psi + sign * s)[0] - top) - other) / sigma for s, other, sigma in looks
            )
            assert shown >= bound - 1e-9
            if bound > 0:
                ratios.append(shown / bound)
    assert min(ratios) < 1.2
    top, bottom = _outputs(coupling_angle(0.3), 1.0, 0.0, 0.0)
    assert mixer_phase_sigmas((top - bottom) / 2, top + bottom, [0.3], looks) == 0.0
