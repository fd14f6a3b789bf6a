"""The fast plate-step path against the RK4 reference integration, its energy border against the
published dynamic pull-in, and the fast chip against the same chip integrating every step."""

from __future__ import annotations

import math
from dataclasses import replace
from typing import NamedTuple

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy.optimize import brentq

from meshsim import dynamics
from meshsim.devices import PlateArrays, plate_arrays, plate_roots
from meshsim.dynamics import LINEAR_LIMIT, PlateSteps, first_peak
from meshsim.params import CouplerDevice
from meshsim.physics import electrostatics as es
from tests.sim.helpers import small_rack

F = NDArray[np.float64]

# Agreement of the peaks, as a fraction of the step's linear swing A = sqrt(y0^2 + (v0/w)^2):
# - the linear response misses the force's curvature. To second order (a Lindstedt-Poincare
#   expansion, from memory) the first maximum of m y'' + k_eff y = (F''/2) y^2 moves by about
#   (F'' A / k_eff) / 3 of A, and the fast path takes only steps with F'' A / k_eff <= LINEAR_LIMIT;
# - the reference samples the motion 64 times a period, so its peak falls short of the true one
#   by up to 1 - cos(pi/64) = 1.2e-3 of A.
# Enough because the chip uses a step's peak only for the snap verdict, which the fast path
# decides exactly (below); 2 % of a 2 V step's swing at 40 V (about 2 % of the gap) is about 1 nm.
PEAK_TOLERANCE = LINEAR_LIMIT / 3.0 + 2e-3
# Verdicts may differ only for steps whose energy lies within this fraction of the well's depth
# of its top: there both answers come from RK4, with time steps set by different batches.
VERDICT_BAND = 1e-3
N = 3000


class Steps(NamedTuple):
    plate: PlateArrays
    x0: F
    v0: F
    volts: F


def _random_steps(q: float, seed: int) -> Steps:
    """N demo plates of quality factor ``q`` with fabrication spread, each stepped from its
    equilibrium at one random voltage to another (up to 5 % above V_PI), half of them while
    still ringing from an earlier step (amplitude up to 5 % of the gap, random phase)."""
    rng = np.random.default_rng(seed)
    device = replace(CouplerDevice(), quality_factor=q)
    plate = plate_arrays(device, N, 1.0 + 0.03 * rng.standard_normal(N), 1.0 + 0.02 * rng.standard_normal(N))
    v_pi = plate.pull_in_volts
    r_from = rng.uniform(0.0, 1.0, N)
    r_to = np.clip(r_from + rng.normal(0.0, 0.1, N), 0.0, 1.05)
    rest = np.nan_to_num(plate.equilibrium(r_from * v_pi), nan=0.0)
    w0 = np.sqrt(plate.spring / plate.mass)
    ringing = rng.uniform(0.0, 0.05, N) * plate.electrical_gap * (rng.random(N) < 0.5)
    phase = rng.uniform(0.0, 2.0 * np.pi, N)
    return Steps(plate, rest + ringing * np.cos(phase), -ringing * w0 * np.sin(phase), r_to * v_pi)


def _solver(plate: PlateArrays) -> PlateSteps:
    return PlateSteps(plate.mass, plate.damping, plate.spring, plate.area, plate.electrical_gap, plate.air_gap)


@pytest.mark.parametrize(("q", "seed"), [(math.inf, 5), (50.0, 1), (5.0, 2), (0.8, 3), (0.3, 4)])
def test_fast_path_agrees_with_the_reference_integration(q: float, seed: int) -> None:
    """On random steps (from rest or ringing, some beyond pull-in) the fast path gives the
    reference's snap verdict outside a band of 0.1 % of the well's depth around its top, and its
    peak within PEAK_TOLERANCE of the step's linear swing."""
    plate, x0, v0, volts = _random_steps(q, seed)

    def force(v: F, x: F) -> F:
        return es.parallel_plate_force(v, plate.area, plate.electrical_gap, x)

    ref_peak, ref_hit = first_peak(x0, v0, volts, plate.mass, plate.damping, plate.spring, force, plate.air_gap)
    solver, index = _solver(plate), np.arange(N)
    peak, hit = solver.first_peak(index, x0, v0, volts)
    verdict = solver.verdict(index, x0, v0, volts)

    far = np.abs(solver.headroom(index, x0, v0, volts)) >= VERDICT_BAND
    assert np.array_equal(hit[far], ref_hit[far])
    assert np.array_equal(verdict.hit[far], ref_hit[far])
    swing = np.sqrt((x0 - verdict.equilibrium_m) ** 2 + (v0 / verdict.w_rad_per_s) ** 2)
    below = ~np.isnan(swing)  # above static pull-in there is no equilibrium to swing about
    assert np.all(np.abs(peak - ref_peak)[below] <= PEAK_TOLERANCE * swing[below])
    # Not vacuous: most steps are decided without integrating, and both verdicts occur.
    assert np.mean(~verdict.integrated) > 0.8
    assert 100 < ref_hit.sum() < N - 100


K, AREA, GAP = 1.0, 1e-8, 2e-6
MASS = K / (2 * math.pi * 500e3) ** 2


def _undamped_from_rest(volts_ratio: float) -> float:
    solver = PlateSteps(
        np.array([MASS]), np.zeros(1), np.array([K]), np.array([AREA]), np.array([GAP]), np.array([GAP])
    )
    v_pi = float(es.pull_in_volts(K, GAP, AREA))
    return float(solver.headroom(np.array([0]), np.zeros(1), np.zeros(1), np.array([volts_ratio * v_pi]))[0])


def test_energy_border_of_an_undamped_step_is_the_dynamic_pull_in() -> None:
    """From rest at x = 0 the step's energy reaches the top of the well exactly at
    V_DPI = sqrt(27/32) V_PI = 0.91856 V_PI: headroom 0 there, positive at 0.918, negative at 0.919.
    Source: energy argument; Leus & Elata, J. MEMS 2008 (from memory); the PHYSICS check values."""
    assert _undamped_from_rest(math.sqrt(27 / 32)) == pytest.approx(0.0, abs=1e-9)
    assert _undamped_from_rest(0.918) > 0.0
    assert _undamped_from_rest(0.919) < 0.0


@pytest.mark.parametrize("ratio", [0.0, 0.3, 0.5, 0.9, 0.999])
def test_plate_roots_are_the_stable_and_unstable_equilibria(ratio: float) -> None:
    """The two rows are the smallest root (the published closed form, electrostatics) and the
    middle root of u (1-u)^2 = (4/27) r^2, found by scipy.optimize.brentq on (1/3, 1)."""
    a = 4.0 / 27.0 * ratio**2
    stable, unstable = plate_roots(np.array([a]))
    assert float(stable[0]) == pytest.approx(float(es.equilibrium_fraction(ratio)), abs=1e-12)
    middle = 1.0 if a == 0.0 else brentq(lambda u: u * (1 - u) ** 2 - a, 1.0 / 3.0, 1.0, xtol=1e-15)
    assert float(unstable[0]) == pytest.approx(middle, abs=1e-7)


def test_plate_roots_are_nan_above_pull_in() -> None:
    """Above V_PI (a > 4/27) neither equilibrium exists."""
    assert np.isnan(plate_roots(np.array([4.0 / 27.0 * 1.001**2]))).all()


def test_chip_with_the_fast_path_matches_the_chip_integrating_every_step(monkeypatch: pytest.MonkeyPatch) -> None:
    """A random sequence of writes - quick steps during ringing, slow ones, some past dynamic and
    static pull-in, releases - leaves the same actuators pulled in, at the same displacements,
    whether the chip decides steps by energy or integrates every one with the reference."""
    rng = np.random.default_rng(7)
    volts = rng.choice([0.0, 10.0, 30.0, 40.0, 44.0, 46.0, 48.0, 52.0], size=(60, 4))
    gaps = rng.choice([0.2e-6, 2e-6, 20e-6, 2e-3], size=60)

    def run() -> tuple[NDArray[np.bool_], F]:
        rack, clock = small_rack()
        pulled = []
        for row, gap in zip(volts, gaps, strict=True):
            clock.advance(float(gap))
            rack.chip.apply_volts(np.array([0, 1, 2, 3]), row, clock.now())
            pulled.append(rack.truth().pulled_in.copy())
        return np.array(pulled), rack.truth().displacement_m

    fast_pulled, fast_x = run()
    monkeypatch.setattr(dynamics, "BARRIER_FRACTION", -math.inf)  # nothing is certain: integrate all
    slow_pulled, slow_x = run()
    assert np.array_equal(fast_pulled, slow_pulled)
    assert fast_pulled.any() and not fast_pulled.all()
    np.testing.assert_allclose(fast_x, slow_x, rtol=1e-12, atol=1e-18)
