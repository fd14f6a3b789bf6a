"""Phase drift of the simulated chip: a seeded random walk per arm and common temperature steps, as a
function of simulated time."""

from __future__ import annotations

import math
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from meshsim.clock import ManualClock, SimClock
from meshsim.params import Drift, LatticeSpec, parse_params
from meshsim.physics.drift import PhaseDrift
from meshsim.rack import SimRack
from meshsim.scenario import load_scenario
from tests.sim.helpers import balanced_coupler, column_params, column_scenario

DEMO = Path(__file__).resolve().parents[2] / "config" / "demo.yaml"
ARMS, D = 4000, 0.05


def _walk(seed: int = 9, arms: int = ARMS, **kw: float) -> PhaseDrift:
    return PhaseDrift(arms, np.random.SeedSequence(seed), rad_per_sqrt_s=D, **kw)  # type: ignore[arg-type]


def _variance_within_chi2(sample: np.ndarray, variance: float) -> bool:
    """The sample variance is consistent with ``variance``: (n - 1) s^2 / sigma^2 inside the central
    99.9 % of chi^2(n - 1) (Cochran's theorem for normal samples; scipy.stats.chi2)."""
    n = len(sample)
    statistic = (n - 1) * np.var(sample, ddof=1) / variance
    return bool(stats.chi2.ppf(0.0005, n - 1) < statistic < stats.chi2.ppf(0.9995, n - 1))


@pytest.mark.parametrize("t", [7.5, 60.0, 300.0, 1234.567])
def test_random_walk_variance_grows_as_d_squared_t(t: float) -> None:
    """Across 4000 arms the walk at time t has mean 0 and variance D^2 t (chi-square bounds), also
    between grid points. Source: the Wiener process, variance linear in time (Einstein, Ann. Phys.
    17:549, 1905; common practice for slow phase noise)."""
    w = _walk().random_walk_rad(t)
    assert abs(w.mean()) < 4 * D * math.sqrt(t / ARMS)
    assert _variance_within_chi2(w, D * D * t)


def test_random_walk_increments_are_independent() -> None:
    """W(t2) - W(t1) has variance D^2 (t2 - t1) and no correlation with W(t1) (|r| < 4/sqrt(n)).
    Source: independent increments of the Wiener process (Einstein 1905; common practice)."""
    walk = _walk()
    early, late = walk.random_walk_rad(40.0), walk.random_walk_rad(250.0)
    step = late - early
    assert _variance_within_chi2(step, D * D * 210.0)
    assert abs(np.corrcoef(early, step)[0, 1]) < 4 / math.sqrt(ARMS)


def test_random_walk_is_reproducible_whatever_order_it_is_read_in() -> None:
    """The same seed gives the same values whether times are read forwards, backwards or alone;
    another seed gives other values; D = 0 or t <= 0 give exact zeros."""
    times = [0.003, 5.0, 10.0, 10.004, 2600.0, 99999.5]
    forwards = [_walk(arms=8).random_walk_rad(t) for t in times]
    shared = _walk(arms=8)
    backwards = [shared.random_walk_rad(t) for t in reversed(times)][::-1]
    for a, b in zip(forwards, backwards, strict=True):
        assert np.array_equal(a, b)
    assert not np.allclose(_walk(seed=10, arms=8).random_walk_rad(5.0), forwards[1])
    assert np.all(_walk(arms=8).random_walk_rad(0.0) == 0.0)
    still = PhaseDrift(8, np.random.SeedSequence(9), rad_per_sqrt_s=0.0)
    assert np.all(still.random_walk_rad(500.0) == 0.0)


def test_random_walk_is_continuous_between_grid_points() -> None:
    """Halfway between two grid points 10 ms apart the walk is the mean of its two ends (linear
    interpolation), so it never jumps between grid points."""
    walk = _walk(arms=50)
    a, b, mid = walk.random_walk_rad(12.34), walk.random_walk_rad(12.35), walk.random_walk_rad(12.345)
    assert np.allclose(mid, (a + b) / 2, atol=1e-12)


def test_scheduled_temperature_step_moves_every_arm_alike() -> None:
    """A step of 0.5 rad at 300 s: nothing before, every arm exactly +0.5 rad after (no random walk)."""
    drift = PhaseDrift(6, np.random.SeedSequence(1), temperature_steps=((300.0, 0.5), (600.0, -0.2)))
    assert np.all(drift.phase_rad(299.999) == 0.0)
    assert np.allclose(drift.phase_rad(300.0), 0.5, atol=1e-15)
    assert np.allclose(drift.phase_rad(700.0), 0.3, atol=1e-15)


def test_random_temperature_steps_arrive_as_a_poisson_process() -> None:
    """Random steps at a mean interval of 600 s over 1000 h: the count is Poisson(6000) (within
    4 sigma), the gaps pass a KS test against the exponential distribution, and the step sizes have
    the configured standard deviation (chi-square bounds). Source: the Poisson process (exponential
    gaps; common practice); KS test as scipy.stats.kstest."""
    hours = 1000.0
    drift = PhaseDrift(3, np.random.SeedSequence(2), temperature_step_interval_s=600.0, temperature_step_rad=0.3)
    times = drift.random_step_times(hours * 3600)
    expected = hours * 3600 / 600.0
    assert abs(len(times) - expected) < 4 * math.sqrt(expected)
    assert stats.kstest(np.diff(times), "expon", args=(0.0, 600.0)).pvalue > 0.01
    levels = np.array([drift.temperature_rad(t + 1e-9) - drift.temperature_rad(t - 1e-9) for t in times[:2000]])
    assert _variance_within_chi2(levels, 0.3**2)


def test_drift_follows_the_rack_clock_and_shows_in_the_truth() -> None:
    """On a manual clock the chip's arms hold still until time moves; five simulated minutes later
    they have drifted as D^2 t across 400 arms (chi-square bounds), and the phase the light sees
    moved by the same amount."""
    gates = 400
    clock = ManualClock()
    rack = SimRack(column_scenario(gates), column_params(gates, drift=Drift(random_walk_rad_per_sqrt_s=D)), clock)
    start = rack.truth()
    assert np.all(start.drift_phase_rad == 0.0)
    clock.advance(300.0)
    later = rack.truth()
    assert _variance_within_chi2(later.drift_phase_rad, D * D * 300.0)
    moved = np.angle(np.exp(1j * (later.mesh_phase_rad - start.mesh_phase_rad)))
    assert np.allclose(moved, np.angle(np.exp(1j * later.drift_phase_rad)), atol=1e-9)


def test_time_scale_runs_minutes_of_drift_in_a_fraction_of_a_second() -> None:
    """With a time scale of 1000, a fifth of a wall second is over three simulated minutes, and the
    arms have drifted by more than 0.2 rad rms."""
    gates = 40
    rack = SimRack(
        column_scenario(gates), column_params(gates, drift=Drift(random_walk_rad_per_sqrt_s=D)), SimClock(1000.0)
    )
    time.sleep(0.2)
    truth = rack.truth()
    assert truth.time_s >= 200.0
    assert float(np.sqrt(np.mean(truth.drift_phase_rad**2))) > 0.2


def _nulled_mzis(pairs: int, drift: Drift) -> tuple[SimRack, ManualClock]:
    """``pairs`` MZIs side by side (gate i then gate pairs + i on modes 2i, 2i + 1), light in every
    top mode, couplers designed for kappa 0.5 at rest (C L = pi/4), no static error: every top
    output starts dark."""
    scenario = column_scenario(2 * pairs)
    balanced = balanced_coupler()
    lattice = LatticeSpec(
        modes=2 * pairs,
        columns=tuple(tuple((f"g{c * pairs + i}", 2 * i) for i in range(pairs)) for c in range(2)),
        taps=tuple((f"m{k}", 1, k) for k in range(2 * pairs)),
        tap_fraction=0.01,
    )
    params = column_params(2 * pairs, coupler=balanced, drift=drift)
    laser = replace(params.laser, input_modes=tuple(range(0, 2 * pairs, 2)))
    clock = ManualClock()
    return SimRack(scenario, replace(params, lattice=lattice, laser=laser), clock), clock


def _extinction_db(tap_power_w: np.ndarray) -> np.ndarray:
    top, bottom = tap_power_w[0::2], tap_power_w[1::2]
    return np.asarray(10 * np.log10((top + bottom) / np.maximum(top, 1e-30)))


def test_default_drift_spoils_an_unlocked_circuit_within_minutes() -> None:
    """Fifty MZIs nulled at the start (extinction > 40 dB) drift, with the default random walk, to a
    median extinction below 25 dB - the figure a lock to minimum must hold - within five simulated
    minutes. Source: MZI output sin^2(phi / 2) with 50:50 couplers (standard); the default drift
    rate is a stand-in."""
    default = Drift()
    assert default.random_walk_rad_per_sqrt_s > 0
    rack, clock = _nulled_mzis(50, default)
    clock.advance(0.01)
    assert np.all(_extinction_db(rack.truth().tap_power_w[: 2 * 50]) > 40.0)
    clock.advance(300.0)
    assert float(np.median(_extinction_db(rack.truth().tap_power_w[: 2 * 50]))) < 25.0


def test_demo_chip_drifts_like_the_defaults() -> None:
    """The demo configuration turns drift on: after five simulated minutes its arms have drifted by
    more than 0.2 rad rms."""
    scenario = load_scenario(DEMO)
    params = parse_params(scenario.simulator)
    assert params.drift.random_walk_rad_per_sqrt_s > 0
    clock = ManualClock()
    rack = SimRack(scenario, params, clock)
    clock.advance(300.0)
    assert float(np.sqrt(np.mean(rack.truth().drift_phase_rad ** 2))) > 0.2


def test_drift_switched_off_leaves_the_chip_still() -> None:
    """With the random walk at 0 and no steps, nothing drifts in an hour."""
    gates = 5
    clock = ManualClock()
    params = column_params(gates, drift=replace(Drift(), random_walk_rad_per_sqrt_s=0.0))
    rack = SimRack(column_scenario(gates), params, clock)
    clock.advance(3600.0)
    assert np.all(rack.truth().drift_phase_rad == 0.0)
