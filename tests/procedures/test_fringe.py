"""Fringe fit of a phase actuator and four-step phase stepping."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import curve_fit

from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.fringe import fit_fringe, four_step_phase, fringe_verdict


def _circular(a: float, b: float) -> float:
    return (a - b + math.pi) % (2 * math.pi) - math.pi


def test_four_step_phase_published_check() -> None:
    """I = 1 + 0.8 cos(0.7 + k pi/2), k = 0..3 gives back phi = 0.7, offset 1 and modulation 0.8.
    Source: Creath, Prog. Optics 26 (1988); Hariharan et al., Appl. Opt. 26:2504 (1987)."""
    samples = [1 + 0.8 * math.cos(0.7 + k * math.pi / 2) for k in range(4)]
    result = four_step_phase(samples)
    assert result.phase_rad == pytest.approx(0.7, abs=1e-12)
    assert result.offset == pytest.approx(1.0, abs=1e-12)
    assert result.amplitude == pytest.approx(0.8, abs=1e-12)


@pytest.mark.parametrize("phase", [-3.0, -1.2, 0.0, 2.5, 3.1])
def test_four_step_phase_covers_the_full_circle(phase: float) -> None:
    """The atan2 form recovers phases in every quadrant (Creath 1988)."""
    samples = [0.3 + 0.2 * math.cos(phase + k * math.pi / 2) for k in range(4)]
    assert four_step_phase(samples).phase_rad == pytest.approx(phase, abs=1e-12)


def test_four_step_phase_refuses_three_samples() -> None:
    """Three samples are refused with a clear error."""
    with pytest.raises(ProcedureInputError, match="exactly four"):
        four_step_phase([1.0, 2.0, 3.0])


def _sweep(seed: int, rate: float, phase0: float, noise: float, points: int = 40, top: float = 40.0):  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(seed)
    volts = np.linspace(0.0, top, points)
    power = 0.5 + 0.4 * np.cos(phase0 + rate * volts**2) + noise * rng.standard_normal(points)
    return volts, power


def test_fit_recovers_parameters_without_noise() -> None:
    """With exact data over two fringes the fit returns the generating parameters."""
    volts, power = _sweep(0, 7.9e-3, 4.0, 0.0)
    fit = fit_fringe(volts, power)
    assert fit.rate_rad_per_v2 == pytest.approx(7.9e-3, rel=1e-8)
    assert _circular(fit.phase0_rad, 4.0) == pytest.approx(0.0, abs=1e-7)
    assert fit.offset == pytest.approx(0.5, abs=1e-9)
    assert fit.amplitude == pytest.approx(0.4, abs=1e-9)
    assert fit.residual_rms < 1e-9
    assert fit.cycles == pytest.approx(7.9e-3 * 1600 / (2 * math.pi), rel=1e-8)


def test_standard_errors_cover_the_truth_at_the_stated_rate() -> None:
    """Over 300 noisy sweeps, |estimate - truth| < 2 standard errors about 95 % of the time for c and phi0
    (a least-squares standard error is a one-sigma normal interval; statistics, common practice)."""
    inside_rate = inside_phase = 0
    trials = 300
    for seed in range(trials):
        volts, power = _sweep(seed, 3.1e-3, 1.0 + seed % 5, 0.02)
        fit = fit_fringe(volts, power)
        inside_rate += abs(fit.rate_rad_per_v2 - 3.1e-3) < 2 * fit.rate_se
        inside_phase += abs(_circular(fit.phase0_rad, 1.0 + seed % 5)) < 2 * fit.phase0_se
    # Binomial(300, 0.954): mean 286, sd 3.6; the band is about +-4 sd.
    assert 0.90 * trials <= inside_rate <= 0.995 * trials
    assert 0.90 * trials <= inside_phase <= 0.995 * trials


def test_fit_agrees_with_levenberg_marquardt_reference() -> None:
    """Parameters and standard errors match scipy's MINPACK Levenberg-Marquardt (curve_fit, method='lm')
    started from the truth, a reference computation independent of our grid seed and trust-region solve."""
    volts, power = _sweep(7, 5.3e-3, 2.2, 0.03)

    def model(v: np.ndarray, a: float, b: float, c: float, p: float) -> np.ndarray:
        return a + b * np.cos(p + c * v**2)

    ref, cov = curve_fit(model, volts, power, p0=[0.5, 0.4, 5.3e-3, 2.2], method="lm")
    ref_se = np.sqrt(np.diag(cov))
    fit = fit_fringe(volts, power)
    assert fit.rate_rad_per_v2 == pytest.approx(ref[2], rel=1e-6)
    assert _circular(fit.phase0_rad, ref[3]) == pytest.approx(0.0, abs=1e-6)
    assert fit.offset == pytest.approx(ref[0], abs=1e-7)
    assert fit.amplitude == pytest.approx(ref[1], abs=1e-7)
    assert fit.rate_se == pytest.approx(ref_se[2], rel=1e-3)
    assert fit.phase0_se == pytest.approx(ref_se[3], rel=1e-3)


def test_growth_model_recovers_an_exponential_phase() -> None:
    """A phase a (exp(b V^2) - 1), the evanescent index rise with a gap closing as V^2, is recovered with b."""
    rng = np.random.default_rng(3)
    volts = np.linspace(0.0, 42.0, 40)
    a, b = 0.14, 2.5e-3
    power = 0.5 + 0.45 * np.cos(2.0 + a * np.expm1(b * volts**2)) + 0.005 * rng.standard_normal(40)
    fit = fit_fringe(volts, power, with_growth=True)
    assert abs(fit.growth_per_v2 - b) < 4 * fit.growth_se
    assert abs(fit.rate_rad_per_v2 - a * b) < 4 * fit.rate_se
    assert float(np.max(np.abs(fit.actuated_phase(volts) - a * np.expm1(b * volts**2)))) < 0.05


def test_verdict_passes_a_good_fit_and_names_each_failure() -> None:
    """A clean fit passes; a flat sweep fails on contrast and cycles with the numbers in the reason."""
    volts, power = _sweep(1, 5e-3, 1.0, 0.005)
    assert fringe_verdict(fringe_fit := fit_fringe(volts, power)).ok, fringe_fit
    volts, power = _sweep(1, 2e-4, 1.0, 0.005, points=10)
    verdict = fringe_verdict(fit_fringe(volts, power))
    assert not verdict.ok
    assert "only 10 points" in verdict.reason
    assert "fringes" in verdict.reason
    assert verdict.checks["points"] == 10.0


@pytest.mark.parametrize(
    ("volts", "power", "message"),
    [
        ([0, 1, 2], [1, 2, 3], "at least 6"),
        ([0, 1, 2, 3, 4, 5], [1, 2, 3, 4, 5], "6 points but power has 5"),
        ([0, -1, 2, 3, 4, 5], [1] * 6, ">= 0"),
        ([0, 1, 2, 3, 4, float("nan")], [1] * 6, "finite"),
        ([1, 1, 1, 2, 2, 2], [1] * 6, "four distinct"),
        ([[0, 1], [2, 3]], [1, 2], "one-dimensional"),
    ],
)
def test_bad_sweeps_are_refused(volts: object, power: object, message: str) -> None:
    """Malformed sweeps raise ProcedureInputError naming the problem."""
    with pytest.raises(ProcedureInputError, match=message):
        fit_fringe(volts, power)


def test_fit_does_not_depend_on_the_power_unit() -> None:
    """The same half-fringe sweep in W (1e-3 scale) and in mW gives the same c and phi0, and A, B, their errors and
    the residual scale with the unit."""
    volts, power = _sweep(12, 2e-3, 0.3, 0.01, points=20)
    in_mw, in_w = fit_fringe(volts, power), fit_fringe(volts, power * 1e-3)
    assert in_w.rate_rad_per_v2 == pytest.approx(in_mw.rate_rad_per_v2, rel=1e-6)
    assert in_w.phase0_rad == pytest.approx(in_mw.phase0_rad, abs=1e-6)
    assert in_w.amplitude == pytest.approx(in_mw.amplitude * 1e-3, rel=1e-6)
    assert in_w.amplitude_se == pytest.approx(in_mw.amplitude_se * 1e-3, rel=1e-4)
    assert in_w.residual_rms == pytest.approx(in_mw.residual_rms * 1e-3, rel=1e-6)
    assert abs(in_mw.rate_rad_per_v2 - 2e-3) < 3 * in_mw.rate_se


def test_loss_model_follows_an_arm_that_dims_with_its_phase() -> None:
    """Two beams, the shifter's arm losing field in proportion to its phase (0.0007 per rad, about
    0.006 dB/rad), summed as fields with numpy (two-beam interference, Saleh & Teich 1991, ch. 2),
    swept even in phase over 1.5 turns: the plain fit leaves a systematic residual that its
    standard errors read as a phase uncertainty of about 0.005 rad; the fit with the loss leaves
    none, recovers phi0 within 0.001 rad and the loss within 5 %."""
    a, b, phi0, loss = 0.14, 2.5e-3, 3.0, 7e-4
    volts = np.sqrt(np.log1p(np.linspace(0.0, 3 * np.pi, 14) / a) / b)
    phi = a * np.expm1(b * volts**2)
    power = np.abs(0.7 + 0.7 * (1.0 - loss * phi) * np.exp(1j * (phi0 + phi))) ** 2
    plain = fit_fringe(volts, power, with_growth=True)
    lossy = fit_fringe(volts, power, with_growth=True, with_loss=True)
    grid = np.linspace(0.0, float(volts.max()), 50)
    assert plain.residual_rms / plain.amplitude > 0.0015 and float(np.max(plain.phase_se(grid))) > 0.005
    assert lossy.residual_rms / lossy.amplitude < 1e-4
    assert float(np.max(lossy.phase_se(grid))) < 0.1 * float(np.max(plain.phase_se(grid)))
    assert abs(_circular(lossy.phase0_rad, phi0)) < 0.001
    assert lossy.amplitude_slope_per_rad == pytest.approx(-loss, rel=0.05)
    assert np.allclose(lossy.power_at(volts), power, atol=1e-4 * lossy.amplitude)
