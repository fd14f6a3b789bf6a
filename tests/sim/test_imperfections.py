"""The simulated chip's imperfections - fabrication errors, crosstalk, phase-dependent loss - against
their models' sources (or marked as stand-ins), and the ground truth they show."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from scipy.constants import epsilon_0
from scipy.optimize import brentq

from meshsim.chip import SimChip
from meshsim.params import CouplerDevice, Crosstalk, Drift, LatticeSpec, PhaseDevice, parse_params
from meshsim.scenario import load_scenario
from tests.sim.helpers import IDEAL_SPREAD, balanced_coupler, column_chip, small_params, small_scenario

DEMO = Path(__file__).resolve().parents[2] / "config" / "demo.yaml"
TWO_PI = 2.0 * math.pi

LOSSLESS_COUPLER = replace(CouplerDevice(), stiction_probability=0.0, loss_db=0.0)
LOSSLESS_PHASE = replace(PhaseDevice(), stiction_probability=0.0, loss_db=0.0, loss_db_per_rad=0.0)


def _chip(scenario_params: tuple[object, object], seed: int = 11) -> SimChip:
    scenario, params = scenario_params
    return SimChip(scenario, params, np.random.default_rng(np.random.SeedSequence(seed)))  # type: ignore[arg-type]


# ------------------------------------------------------------------ static phase errors


def test_static_phase_errors_are_uniform_over_two_pi() -> None:
    """500 arms' static phase errors lie in [0, 2 pi) and pass a Kolmogorov-Smirnov test against
    the uniform distribution (p > 0.01), which rejects a span 10 % too short (p < 1e-3).
    Source: uniform unknown phases of fabricated arms, Miller, Photon. Res. 1:1 (2013); the KS test
    (Kolmogorov 1933; Smirnov 1948) as scipy.stats.kstest."""
    chip = column_chip(500, spread=replace(IDEAL_SPREAD, static_phase_span_rad=TWO_PI))
    static = chip.truth(0.0).static_phase_rad
    assert static.min() >= 0.0 and static.max() < TWO_PI
    assert stats.kstest(static, "uniform", args=(0.0, TWO_PI)).pvalue > 0.01
    assert stats.kstest(static, "uniform", args=(0.0, 0.9 * TWO_PI)).pvalue < 1e-3


def test_static_phase_span_is_configurable_and_zero_switches_it_off() -> None:
    """A span of 1 rad gives errors uniform in [0, 1) (KS p > 0.01); a span of 0 gives none at all,
    and the light then sees only the actuated phase."""
    short = column_chip(300, spread=replace(IDEAL_SPREAD, static_phase_span_rad=1.0)).truth(0.0)
    assert short.static_phase_rad.max() < 1.0
    assert stats.kstest(short.static_phase_rad, "uniform", args=(0.0, 1.0)).pvalue > 0.01
    off = column_chip(20).truth(0.0)
    assert np.all(off.static_phase_rad == 0.0) and np.all(off.mesh_phase_rad == 0.0)


def test_fabrication_errors_are_reproducible_and_independent_of_each_other() -> None:
    """The same seed draws the same chip; another seed another; switching the splitting error off
    leaves the static phase errors unchanged (each error has its own random stream)."""
    both = replace(IDEAL_SPREAD, static_phase_span_rad=TWO_PI, splitting_angle_rad=0.08)
    only_static = replace(IDEAL_SPREAD, static_phase_span_rad=TWO_PI)
    a = column_chip(30, seed=4, spread=both).truth(0.0)
    b = column_chip(30, seed=4, spread=both).truth(0.0)
    c = column_chip(30, seed=5, spread=both).truth(0.0)
    d = column_chip(30, seed=4, spread=only_static).truth(0.0)
    assert np.array_equal(a.static_phase_rad, b.static_phase_rad)
    assert np.array_equal(a.splitting_angle_rad, b.splitting_angle_rad)
    assert not np.allclose(a.static_phase_rad, c.static_phase_rad)
    assert np.array_equal(a.static_phase_rad, d.static_phase_rad)
    assert np.all(d.splitting_angle_rad == 0.0)


# ------------------------------------------------------------------ splitting error


def test_splitting_error_spreads_kappa_at_rest_as_a_normal_angle_error() -> None:
    """Couplers designed for C L = pi/4 at rest (kappa 0.5) with an angle error of sigma 0.08 rad:
    the error recovered from each rest kappa, arcsin(sqrt(kappa)) - pi/4, passes a KS test against
    N(0, 0.08^2) (p > 0.01); without the error every rest kappa is 0.5.
    Source: kappa = sin^2(C L), Yariv, IEEE JQE 9:919 (1973); the additive splitting-angle error,
    Miller, Optica 2:747 (2015) and Pai et al., Phys. Rev. Applied 11:064044 (2019) (from memory);
    the normal spread is a stand-in."""
    balanced = balanced_coupler()
    spread = replace(IDEAL_SPREAD, splitting_angle_rad=0.08)
    kappa = column_chip(400, coupler=balanced, spread=spread).truth(0.0).kappa
    recovered = np.arcsin(np.sqrt(kappa)) - math.pi / 4
    assert stats.kstest(recovered, "norm", args=(0.0, 0.08)).pvalue > 0.01
    assert np.allclose(column_chip(10, coupler=balanced).truth(0.0).kappa, 0.5, atol=1e-12)


# ------------------------------------------------------------------ crosstalk


def _comb_displacement(volts: float, share: float) -> float:
    """x = share * n eps0 t V^2 / (g k) (Tang, Nguyen, Howe, Sens. Actuators 20:25, 1989)."""
    d = PhaseDevice()
    return share * d.fingers * epsilon_0 * d.thickness_m * volts**2 / (d.finger_gap_m * d.spring_n_per_m)


def _plate_displacement(volts: float) -> float:
    """Root of k x = eps0 A V^2 / (2 (g - x)^2) on [0, g/3] (Senturia 2001, ch. 6) by brentq."""
    d = CouplerDevice()
    gap = d.air_gap_m + d.dielectric_m / d.dielectric_eps_r

    def balance(x: float) -> float:
        return d.spring_n_per_m * x - epsilon_0 * d.area_m2 * volts**2 / (2 * (gap - x) ** 2)

    return float(brentq(balance, 0.0, gap / 3, xtol=1e-18))


@pytest.mark.parametrize("volts", [20.0, -20.0])
def test_crosstalk_moves_neighbours_by_their_share_of_the_drive(volts: float) -> None:
    """Three gates in a column, shares 0.02 within a gate and 0.01 between side-by-side gates: driving
    the middle coupler alone moves its own gate's phase shifter as 2 % of a comb drive at that
    voltage and the neighbouring couplers as plates driven at sqrt(0.01) of it; the other phase
    shifters stay put. Either polarity pulls the same way (force ~ V^2).
    Source: electrostatic force attractive and ~ V^2, Senturia, Microsystem Design (2001) ch. 6;
    comb drive x = n eps0 t V^2 / (g k), Tang et al. (1989); the shares are a stand-in."""
    chip = column_chip(
        3,
        coupler=replace(CouplerDevice(), stiction_probability=0.0, charging_fraction=0.0),
        phase=replace(PhaseDevice(), stiction_probability=0.0, charging_fraction=0.0),
        crosstalk=Crosstalk(within_gate_fraction=0.02, adjacent_gate_fraction=0.01),
    )
    c1, p1 = chip.index["c1"], chip.index["p1"]
    chip.apply_volts(np.array([c1]), np.array([volts]), 0.0)
    x = chip.truth(1.0).displacement_m
    assert x[p1] > 0.0
    assert x[p1] == pytest.approx(_comb_displacement(volts, 0.02), rel=1e-9, abs=0)
    neighbour_x = _plate_displacement(math.sqrt(0.01) * abs(volts))
    for neighbour in ("c0", "c2"):
        assert x[chip.index[neighbour]] == pytest.approx(neighbour_x, rel=1e-9, abs=0)
    assert x[chip.index["p0"]] == 0.0 and x[chip.index["p2"]] == 0.0
    assert x[c1] == pytest.approx(_plate_displacement(abs(volts)), rel=1e-9, abs=0)


def test_crosstalk_shows_in_the_light_and_zero_switches_it_off() -> None:
    """With crosstalk the gate whose coupler alone is driven gains phase; with shares 0 it gains none."""
    on = column_chip(2, crosstalk=Crosstalk(within_gate_fraction=0.02, adjacent_gate_fraction=0.0))
    off = column_chip(2)
    for chip in (on, off):
        chip.apply_volts(np.array([chip.index["c0"]]), np.array([30.0]), 0.0)
    assert on.truth(1.0).phase_rad[0] > 1e-3
    assert off.truth(1.0).phase_rad[0] == 0.0


# ------------------------------------------------------------------ insertion loss


def test_phase_dependent_loss_in_db_matches_the_measured_power_ratio() -> None:
    """A phase arm losing 0.05 dB per rad of actuated phase: 10 log10 of the tap power at rest over
    the tap power when driven equals 0.05 dB x the truth's actuated phase, and the truth's
    insertion loss rises by the same. Source: the definition of the decibel, L = 10 log10(P1/P2)
    (IEC 60027-3; common practice); the linear loss-per-radian model is a stand-in."""
    phase = replace(LOSSLESS_PHASE, loss_db_per_rad=0.05)
    chip = column_chip(1, phase=phase)
    rest = chip.truth(0.0)
    chip.apply_volts(np.array([chip.index["p0"]]), np.array([40.0]), 0.001)
    driven = chip.truth(1.0)
    phi = float(driven.phase_rad[0])
    assert phi > 3.0  # a real stretch of the curve
    measured_db = 10 * math.log10(rest.tap_power_w[0] / driven.tap_power_w[0])
    assert measured_db == pytest.approx(0.05 * phi, rel=1e-9, abs=0)
    assert driven.insertion_loss_db[0] - rest.insertion_loss_db[0] == pytest.approx(0.05 * phi, rel=1e-12, abs=0)


def test_default_phase_dependent_loss_is_a_few_hundredths_of_a_db_over_two_pi() -> None:
    """The default extra loss over 2 pi of actuated phase lies between 0.01 and 0.1 dB (stand-in for
    'a few hundredths of a dB'; common practice puts a whole MEMS phase shifter at 0.1-0.3 dB)."""
    assert 0.01 <= PhaseDevice().loss_db_per_rad * TWO_PI <= 0.1


# ------------------------------------------------------------------ the phase the light sees


def test_mesh_phase_and_kappa_in_the_truth_are_what_the_light_sees() -> None:
    """Two gates in series form an MZI; with static errors, splitting errors and drift on, the tap
    after it reads 1 % of P |t1 t2 e^(i phi) - s1 s2|^2 (t = sqrt(1 - kappa), s = sqrt(kappa)),
    with kappa and phi = (static + actuated + drift) mod 2 pi taken from the truth, at rest, driven
    and minutes later. Source: the 2x2 coupler matrix [[t, i s], [i s, t]] (Haus & Huang, Proc.
    IEEE 79:1505, 1991) multiplied out (standard)."""
    lattice = LatticeSpec(modes=2, columns=((("g0", 0),), (("g1", 0),)), taps=(("m0", 1, 0),), tap_fraction=0.01)
    spread = replace(IDEAL_SPREAD, static_phase_span_rad=TWO_PI, splitting_angle_rad=0.08)
    params = small_params(
        lattice=replace(lattice, transition_loss_db=0.0),
        coupler=LOSSLESS_COUPLER,
        phase=LOSSLESS_PHASE,
        spread=spread,
        drift=Drift(random_walk_rad_per_sqrt_s=0.05, temperature_steps=((200.0, 0.5),)),
    )
    scenario = replace(small_scenario(), monitors=small_scenario().monitors[:1])
    chip = _chip((scenario, params))
    power = params.laser.power_w
    seen = []
    for t, volts in ((0.0, (0.0, 0.0)), (1.0, (18.0, 25.0)), (300.0, (18.0, 25.0))):
        chip.apply_volts(np.array([chip.index["c0"], chip.index["p0"]]), np.array(volts), t)
        truth = chip.truth(t + 0.5)
        k1, k2 = truth.kappa
        t1, t2, s1, s2 = math.sqrt(1 - k1), math.sqrt(1 - k2), math.sqrt(k1), math.sqrt(k2)
        phi = float(truth.mesh_phase_rad[0])
        expected = 0.01 * power * abs(t1 * t2 * np.exp(1j * phi) - s1 * s2) ** 2
        assert truth.tap_power_w[0] == pytest.approx(expected, rel=1e-9, abs=0)
        total = truth.static_phase_rad[0] + truth.phase_rad[0] + truth.drift_phase_rad[0]
        assert phi == pytest.approx(total % TWO_PI, abs=1e-12)
        seen.append(phi)
    assert len({round(p, 6) for p in seen}) == 3


def test_lossless_lattice_with_every_imperfection_stays_unitary() -> None:
    """The demo lattice with its static and splitting errors, crosstalk and drift but every loss and
    tap set to 0, driven to random voltages: its transfer matrix is unitary to 1e-12; with the
    phase-dependent loss on, no singular value exceeds 1 and some fall below.
    Source: a lossless passive network conserves power (unitary; standard, e.g. Haus & Huang 1991)."""
    scenario = load_scenario(DEMO)
    base = parse_params(scenario.simulator)
    assert base.lattice is not None
    lossless = replace(
        base,
        coupler=replace(base.coupler, loss_db=0.0),
        phase=replace(base.phase, loss_db=0.0, loss_db_per_rad=0.0),
        lattice=replace(base.lattice, tap_fraction=0.0, transition_loss_db=0.0),
    )
    assert lossless.spread.static_phase_span_rad > 0 and lossless.crosstalk.within_gate_fraction > 0
    assert lossless.drift.random_walk_rad_per_sqrt_s > 0
    lossy = replace(lossless, phase=replace(lossless.phase, loss_db_per_rad=0.01))
    rng = np.random.default_rng(2)
    for params, unitary in ((lossless, True), (lossy, False)):
        chip = _chip((scenario, params))
        volts = np.zeros(len(chip.ids))
        volts[chip.couplers] = rng.uniform(0.0, 0.8, len(chip.couplers)) * chip.plate.pull_in_volts
        volts[chip.phases] = rng.uniform(0.0, 40.0, len(chip.phases))
        chip.apply_volts(np.arange(len(chip.ids)), volts, 0.0)
        u = chip.transfer_matrix(120.0)
        singular = np.linalg.svd(u, compute_uv=False)
        if unitary:
            assert np.allclose(u @ u.conj().T, np.eye(len(u)), atol=1e-12)
        else:
            assert singular.max() <= 1.0 + 1e-12 and singular.min() < 1.0 - 1e-4
