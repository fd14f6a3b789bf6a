"""Dither choice, lock-in demodulation, the normalised PI step and the dither's power cost."""

from __future__ import annotations

import math

import numpy as np
import pytest

from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.dither import (
    demodulate,
    dither_cycles,
    dither_offsets,
    dither_power_penalty,
    loop_poles,
    pi_step,
)


def test_first_harmonic_matches_the_published_taylor_example() -> None:
    """f = cos^2 x at x0 = 0.3, a = 0.01: 2<y sin wt>/a = -0.56461 against f' = -0.56464.
    Source: Taylor expansion of y = f(x0 + a sin wt); extremum seeking, Krstic & Wang, Automatica 36:595 (2000)."""
    window = 64
    y = np.cos(0.3 + dither_offsets([1], [0.01], window)[0]) ** 2
    result = demodulate(y, [1], [0.01])
    assert result.slope[0] == pytest.approx(-0.56461, abs=1e-5)
    assert -math.sin(0.6) == pytest.approx(-0.56464, abs=1e-5)
    # Second harmonic: 2<y cos 2wt> = -a^2 f''/4 with f'' = -2 cos(2 x0) (same source).
    assert result.curvature[0] == pytest.approx(-2 * math.cos(0.6), rel=1e-4)


@pytest.mark.parametrize("seed", range(5))
def test_demodulation_matches_numpy_fft(seed: int) -> None:
    """The 1f and 2f estimates equal the FFT bins: slope = -2 Im Y[k] / (N a), curvature = -8 Re Y[2k] / (N a^2)
    (reference computation with numpy.fft)."""
    rng = np.random.default_rng(seed)
    window, cycles, amps = 256, [3, 7, 11], [0.02, 0.05, 0.1]
    y = rng.normal(size=window)
    spectrum = np.fft.fft(y)
    result = demodulate(y, cycles, amps)
    for i, (k, a) in enumerate(zip(cycles, amps, strict=True)):
        assert result.slope[i] == pytest.approx(-2 * spectrum[k].imag / (window * a), rel=1e-10, abs=1e-12)
        assert result.curvature[i] == pytest.approx(-8 * spectrum[2 * k].real / (window * a * a), rel=1e-10, abs=1e-12)
    assert result.mean == pytest.approx(spectrum[0].real / window)


def _shared_monitor(x: np.ndarray) -> np.ndarray:
    """Power of four coherent arms summed on one detector: every lock's response depends on all the others."""
    return np.abs(np.exp(1j * x).sum(axis=0)) ** 2 / 16


def _true_derivatives(x0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """d/dx_i and d2/dx_i2 of |sum_j exp(i x_j)|^2 / 16 = (4 + 2 sum_{i<j} cos(x_i - x_j)) / 16, differentiated
    by hand: -2 sum_j sin(x_i - x_j) / 16 and -2 sum_{j != i} cos(x_i - x_j) / 16."""
    diff = x0[:, None] - x0[None, :]
    return -2 * np.sin(diff).sum(axis=1) / 16, -2 * (np.cos(diff).sum(axis=1) - 1) / 16


def test_clash_free_dithers_separate_four_locks_on_one_monitor() -> None:
    """With dither_cycles, each of four locks on one shared monitor gets its own slope and curvature within 1 %;
    with a clashing choice (k = 1, 2, 3, 5: 5 - 3 = 2 x 1, 1 + 3 = 2 x 2) the curvatures are far off."""
    window, amp = 512, 0.03
    x0 = np.array([0.2, 1.1, -0.7, 2.0])
    slope, curvature = _true_derivatives(x0)
    for cycles, good in ((dither_cycles(4, window), True), ((1, 2, 3, 5), False)):
        x = x0[:, None] + dither_offsets(cycles, [amp] * 4, window)
        result = demodulate(_shared_monitor(x), cycles, [amp] * 4)
        slope_error = np.max(np.abs(np.array(result.slope) - slope)) / np.max(np.abs(slope))
        curvature_error = np.max(np.abs(np.array(result.curvature) - curvature)) / np.max(np.abs(curvature))
        assert slope_error < 0.01  # second-order products are cosines: they never reach the sine (1f) bins
        assert (curvature_error < 0.01) == good, (cycles, curvature_error)


def test_dither_patterns_are_orthogonal_over_the_window() -> None:
    """Sines of distinct whole-cycle bins are orthogonal over the window; each has energy N a^2 / 2 (discrete
    Fourier orthogonality, standard)."""
    window = 128
    patterns = dither_offsets(dither_cycles(5, window), [1.0] * 5, window)
    assert np.allclose(patterns @ patterns.T, np.eye(5) * window / 2, atol=1e-9)


def test_integral_loop_follows_the_standard_first_order_response() -> None:
    """On a linear plant with the slope known, the error after n steps is e0 (1 - g)^n; with the true slope r
    times the assumed one it is e0 (1 - g r)^n (standard discrete first-order loop; e.g. Ogata,
    Discrete-Time Control Systems)."""
    for gain, ratio in ((0.3, 1.0), (0.5, 1.0), (0.5, 1.6), (1.0, 1.0)):
        slope, target, x = 2.0, 0.4, 1.4
        errors = []
        for _ in range(12):
            error = ratio * slope * (x - target)
            errors.append(error)
            x += pi_step(error, slope, integral_gain=gain)
        expected = [errors[0] * (1 - gain * ratio) ** n for n in range(12)]
        assert errors == pytest.approx(expected, abs=1e-12)
        assert abs(loop_poles(gain, 0.0, ratio)[0]) == pytest.approx(abs(1 - gain * ratio), abs=1e-12)


def test_pi_loop_decays_at_its_slowest_pole() -> None:
    """With a proportional term the error's decay per step approaches the largest pole magnitude."""
    kp, ki, slope = 0.3, 0.4, -1.5
    x, previous, errors = 2.0, 0.0, []
    for _ in range(60):
        error = slope * x
        x += pi_step(error, slope, integral_gain=ki, proportional_gain=kp, previous_error=previous)
        previous = error
        errors.append(abs(error))
    poles = loop_poles(ki, kp)
    assert max(abs(p) for p in poles) < 1
    assert errors[-1] / errors[-2] == pytest.approx(max(abs(p) for p in poles), rel=1e-3)


def _seek_peak(gain: float, calibrated_curvature: float = -2.0, windows: int = 25) -> float:
    """Extremum seeking on the fringe cos^2 x: dither, demodulate, integral step normalised by the calibrated
    curvature at the peak (truly f''(0) = -2)."""
    x, window, amp = 0.8, 64, 0.05
    for _ in range(windows):
        samples = np.cos(x + dither_offsets([1], [amp], window)[0]) ** 2
        result = demodulate(samples, [1], [amp])
        x += pi_step(result.slope[0], calibrated_curvature, integral_gain=gain, max_step=0.5)
    return x


def test_extremum_seeking_is_stable_at_twice_the_nominal_gain() -> None:
    """Nominal gain 0.5 and twice it both settle on the fringe peak; a loop gain past the bound 2 (gain 1 with a
    curvature calibrated 2.2 times too small) does not.
    Source: Krstic & Wang, Automatica 36:595 (2000); bound of the discrete first-order loop (common practice)."""
    for gain in (0.5, 1.0):
        assert abs(_seek_peak(gain)) < 1e-6
    assert abs(_seek_peak(1.0, calibrated_curvature=-2.0 / 2.2)) > 1e-2


def test_dither_power_penalty_published_value() -> None:
    """a = 0.1 rad at a fringe peak costs 0.12492 % of the power, about a^2 / 8.
    Source: derived with Bessel J0 (PHYSICS.md); checked here against a numerical average over one period."""
    assert dither_power_penalty(0.1) == pytest.approx(0.0012492, abs=5e-8)
    t = np.linspace(0, 2 * np.pi, 20001)
    average = np.trapezoid((1 + np.cos(0.1 * np.sin(t))) / 2, t) / (2 * np.pi)
    assert dither_power_penalty(0.1) == pytest.approx(1 - average, rel=1e-8)
    assert dither_power_penalty(0.1) == pytest.approx(0.1**2 / 8, rel=0.01)


def test_dither_cycles_refuse_an_impossible_request() -> None:
    """Asking for more clash-free dithers than a window holds is refused with how many fit."""
    with pytest.raises(ProcedureInputError, match="fit only"):
        dither_cycles(20, 64)


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: pi_step(1.0, 0.0, integral_gain=0.5), "cannot tell which way"),
        (lambda: pi_step(1.0, 1.0, integral_gain=2.5), "gains"),
        (lambda: pi_step(math.nan, 1.0, integral_gain=0.5), "error must be finite"),
        (lambda: demodulate(np.zeros(64), [20], [0.1]), "below N/2"),
        (lambda: demodulate(np.zeros(64), [2], [0.1, 0.2]), "amplitudes has 2"),
        (lambda: dither_cycles(0, 64), "locks"),
        (lambda: dither_power_penalty(math.inf), "finite"),
    ],
)
def test_bad_loop_inputs_are_refused(call: object, message: str) -> None:
    """Each bad input raises ProcedureInputError with a specific message."""
    with pytest.raises(ProcedureInputError, match=message):
        call()  # type: ignore[operator]
