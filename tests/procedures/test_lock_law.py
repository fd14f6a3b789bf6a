"""The lock law: harmonic phase detector, fraction error, loop response, dither plan and states."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import scipy.fft
import scipy.signal
from scipy.special import j0

from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.dither import demodulate, dither_cycles, dither_offsets, loop_poles, pi_step
from meshwarden.procedures.lock_law import (
    MAX_STEP_RAD,
    NOMINAL_GAIN,
    demodulate_detrended,
    extremum_error,
    fraction_error,
    fraction_samples,
    gain_for,
    monitor_groups,
    next_state,
    parse_hold,
    plan_dithers,
    residual_rms,
)

WINDOW, AMP = 8, 0.03


def _fringe_window(x0: float, *, a: float = AMP, r: float = 1.0, kind: str = "max") -> tuple[float, float]:
    """Demodulated (slope, curvature) of P = 1 + 0.8 cos(r x) (max at 0) or 1 - 0.8 cos(r x) (min at 0)."""
    x = x0 + dither_offsets([1], [a], WINDOW)[0]
    sign = 1.0 if kind == "max" else -1.0
    result = demodulate(1.0 + sign * 0.8 * np.cos(r * x), [1], [a])
    return result.slope[0], result.curvature[0]


@pytest.mark.parametrize("kind", ["max", "min"])
def test_phase_detector_gives_the_distance_from_the_held_extremum(kind: str) -> None:
    """Over the whole fringe, atan2 of the 1f and 2f estimates returns the phase from the held extremum
    within 1 mrad (a = 0.03 rad; the estimates' bias is O(a^2); Taylor expansion of y = f(x0 + a sin wt),
    Krstic & Wang, Automatica 36:595, 2000)."""
    for delta in np.linspace(-3.0, 3.0, 61):
        slope, curvature = _fringe_window(float(delta), kind=kind)
        assert extremum_error(slope, curvature, kind) == pytest.approx(delta, abs=1e-3)


def test_detector_with_the_learnt_fringe_reads_the_phase_from_the_first_harmonic() -> None:
    """With the fringe amplitude B known, the curvature estimate is not used at all (here: wrong in size and
    sign): within pi/2 of the held extremum the reading is the phase exactly, beyond it pi - |delta| with the
    right sign (s = -B sin delta, the sinusoidal fringe of the module doc); without B the bad curvature
    spoils it."""
    rng = np.random.default_rng(7)
    b = 4.0
    for delta in np.linspace(-3.0, 3.0, 41):
        s, c = -b * math.sin(delta), -b * math.cos(delta)
        noisy = c * rng.uniform(-5.0, 5.0)
        expected = delta if abs(delta) <= math.pi / 2 else math.copysign(math.pi - abs(delta), delta)
        assert extremum_error(s, noisy, "max", fringe=b) == pytest.approx(expected, abs=1e-9)
        assert extremum_error(-s, -noisy, "min", fringe=b) == pytest.approx(expected, abs=1e-9)
    assert abs(extremum_error(-b * math.sin(1.2), 5 * b * math.cos(1.2), "max") - 1.2) > 0.5


def test_detector_gain_near_the_lock_does_not_depend_on_the_calibration_slope() -> None:
    """With the fringe cos(r x) (a calibration r times off), the detector reads atan(tan(r dx) / r), which is
    dx to first order whatever r (derived in the module doc): within 1 % for dx = 0.05 and r from 0.5 to 2."""
    for r in (0.5, 0.8, 1.0, 1.5, 2.0):
        dx = 0.05
        slope, curvature = _fringe_window(dx, r=r)  # dither and x in the lock's (wrongly scaled) value units
        reading = extremum_error(slope, curvature, "max")
        assert reading == pytest.approx(math.atan(math.tan(r * dx) / r), rel=2e-3)
        assert reading == pytest.approx(dx, rel=0.01)


def test_fraction_held_value_removes_the_dither_bias() -> None:
    """x = X0 + X1 cos(phi) dithered by a sin wt averages to X0 + X1 J0(a) cos(phi0) (Bessel's integral,
    scipy.special.j0); the held value mean - a^2 x''/4 is X0 + X1 cos(phi0) to O(a^4)."""
    a, x0, x1 = 0.1, 0.5, 0.45
    for phi0 in (0.3, 1.2, 2.0, -0.7):
        phase = phi0 + dither_offsets([1], [a], 64)[0]
        x = x0 + x1 * np.cos(phase)
        result = demodulate(x, [1], [a])
        assert result.mean == pytest.approx(x0 + x1 * j0(a) * math.cos(phi0), abs=1e-12)
        error, slope = fraction_error(result.mean, result.slope[0], result.curvature[0], 0.3, a)
        assert error + 0.3 == pytest.approx(x0 + x1 * math.cos(phi0), abs=a**4)
        assert slope == pytest.approx(-x1 * math.sin(phi0), rel=0.01)


def test_fraction_demodulation_matches_scipy_fft_bins() -> None:
    """The fraction stream of two ports, demodulated, equals scipy.fft's bins k and 2k (reference computation,
    an FFT implementation independent of numpy's)."""
    rng = np.random.default_rng(3)
    window, k, a = 40, 3, 0.05
    pa, pb = rng.uniform(1e-6, 2e-6, window), rng.uniform(1e-6, 2e-6, window)
    x = fraction_samples(pa, pb)
    assert np.allclose(x, pa / (pa + pb))
    spectrum = scipy.fft.fft(x)
    result = demodulate(x, [k], [a])
    assert result.slope[0] == pytest.approx(-2 * spectrum[k].imag / (window * a), rel=1e-9)
    assert result.curvature[0] == pytest.approx(-8 * spectrum[2 * k].real / (window * a * a), rel=1e-9)


def test_detrended_demodulation_ignores_a_ramp_that_spoils_the_plain_one() -> None:
    """On the fringe 1 + 0.8 cos(x) at x0 = 0.5 rad (f' = -0.8 sin 0.5, f'' = -0.8 cos 0.5, by hand) plus a
    ramp of 1e-3 per window, the detrended estimates stay within 2 % of f' and f'' while the plain
    projection's curvature is off by more than half (a ramp is not orthogonal to the bins); with no ramp
    it agrees with numpy's FFT bins to 0.1 % (the fringe's higher harmonics correlate a little with n)."""
    window, a, x0 = 8, 0.03, 0.5
    clean = 1.0 + 0.8 * np.cos(x0 + dither_offsets([1], [a], window)[0])
    ramp = 1e-3 * np.arange(window) / window
    fit, plain = demodulate_detrended(clean + ramp, [1], [a]), demodulate(clean + ramp, [1], [a])
    assert fit.slope[0] == pytest.approx(-0.8 * math.sin(x0), rel=0.02)
    assert fit.curvature[0] == pytest.approx(-0.8 * math.cos(x0), rel=0.02)
    assert abs(plain.curvature[0] / (-0.8 * math.cos(x0)) - 1) > 0.5
    spectrum = np.fft.fft(clean)
    exact = demodulate_detrended(clean, [1], [a])
    assert exact.slope[0] == pytest.approx(-2 * spectrum[1].imag / (window * a), rel=1e-3)
    assert exact.curvature[0] == pytest.approx(-8 * spectrum[2].real / (window * a * a), rel=1e-3)


def _closed_loop(gain: float, kick: float, windows: int) -> list[float]:
    """The lock law on a fringe: each window demodulates, reads the phase error, corrects the centre once;
    the optimum jumps by ``kick`` before the first window."""
    centre, optimum, errors = 0.0, kick, []
    for _ in range(windows):
        slope, curvature = _fringe_window(centre - optimum)
        error = extremum_error(slope, curvature, "max")
        errors.append(centre - optimum)
        centre += pi_step(error, 1.0, integral_gain=gain, max_step=MAX_STEP_RAD)
    return errors


def test_loop_follows_the_standard_first_order_step_response() -> None:
    """After a 0.1 rad step of the optimum the error follows the step response of the discrete sensitivity
    S(z) = (z - 1) / (z - (1 - K)) to 1 % of the step (reference: scipy.signal.dstep; the standard
    first-order discrete loop, e.g. Ogata, Discrete-Time Control Systems)."""
    for gain in (NOMINAL_GAIN, 0.3):
        errors = _closed_loop(gain, 0.1, 12)
        _, (response,) = scipy.signal.dstep(([1.0, -1.0], [1.0, -(1.0 - gain)], 1.0), n=12)
        assert np.allclose(np.array(errors), -0.1 * response[:, 0], atol=1e-3)


def test_loop_stays_stable_at_twice_the_nominal_gain() -> None:
    """At twice the nominal gain a 0.5 rad kick is pulled back within a few windows, and the loop's pole
    |1 - K| stays inside the unit circle (the discrete first-order bound 0 < K < 2, common practice)."""
    errors = _closed_loop(2 * NOMINAL_GAIN, 0.5, 10)
    assert abs(errors[-1]) < 1e-3
    assert all(abs(b) <= abs(a) + 1e-9 for a, b in itertools.pairwise(errors))
    assert max(abs(p) for p in loop_poles(2 * NOMINAL_GAIN)) < 1.0
    assert max(abs(p) for p in loop_poles(2 * NOMINAL_GAIN, 0.0, slope_ratio=2.1)) > 1.0


def test_locks_on_separate_monitors_reuse_cycles_and_shared_ones_do_not() -> None:
    """Locks are grouped by shared monitors (directly or through a third); within a group the cycles are
    distinct and clash-free (dither_cycles), across groups they are reused, and the window is the shortest
    even one that fits the largest group."""
    sets = [frozenset({"m0"}), frozenset({"m1"}), frozenset({"m0", "m2"}), frozenset({"m2", "m5"}), frozenset({"m3"})]
    assert monitor_groups(sets) == [0, 1, 0, 0, 2]
    window, cycles = plan_dithers(sets)
    assert (cycles[0], cycles[2], cycles[3]) == dither_cycles(3, window)
    assert cycles[1] == cycles[4] == cycles[0]
    with pytest.raises(ProcedureInputError):
        dither_cycles(3, window - 2)
    assert plan_dithers([frozenset({"m0"})] * 1) == (8, [1])


def test_bandwidth_maps_to_a_gain_and_is_refused_past_the_bound() -> None:
    """K = 2 pi f T; a bandwidth needing K > 1 is refused naming the highest allowed; none gives 0.5."""
    assert gain_for(None, 0.024) == NOMINAL_GAIN
    assert gain_for(2.0, 0.025) == pytest.approx(2 * math.pi * 2.0 * 0.025)
    with pytest.raises(ProcedureInputError, match=r"at most 6\.37 Hz"):
        gain_for(10.0, 0.025)


def test_states_follow_the_error() -> None:
    """Acquiring becomes locked after three small errors; locked becomes lost on a large one."""
    assert next_state("acquiring", 0.01, [0.01, 0.02], "max") == "acquiring"
    assert next_state("acquiring", 0.01, [0.3, 0.01, 0.02, 0.01], "max") == "locked"
    assert next_state("locked", 0.5, [0.5], "max") == "locked"
    assert next_state("locked", 1.5, [1.5], "min") == "lost"
    assert next_state("locked", 0.2, [0.2], "fraction") == "lost"
    assert residual_rms([3.0, 4.0]) == pytest.approx(math.sqrt(12.5))
    assert residual_rms([]) == 0.0


@pytest.mark.parametrize(
    ("text", "message"),
    [("maximum", "must be 'max'"), ("fraction=1.5", "between 0 and 1"), ("fraction=x", "between 0 and 1")],
)
def test_bad_holds_are_refused(text: str, message: str) -> None:
    """Each bad hold raises ProcedureInputError with a specific message."""
    with pytest.raises(ProcedureInputError, match=message):
        parse_hold(text)
    assert parse_hold("fraction=0.25").text() == "fraction=0.25"
