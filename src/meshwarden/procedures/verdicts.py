"""Scan verdicts for actuators and monitors, each with its evidence, and the detector noise they use.

Detector noise (rms current over a bandwidth B): shot noise sqrt(2 q (I_p + I_d) B) (Schottky) and
the Johnson noise of a transimpedance amplifier's feedback resistor sqrt(4 k T B / R_f) (Johnson
1928; Nyquist 1928), with the ADC's quantisation LSB / sqrt(12) (Kester, Analog Devices MT-001),
added in quadrature as independent sources. Constants from scipy.constants.

A monitor is called noisy when its sample standard deviation passes the one-sided chi-square bound
sigma sqrt(chi2_{1-alpha}(n-1) / (n-1)): for Gaussian noise (n-1) s^2 / sigma^2 follows chi-square
with n-1 degrees of freedom (standard statistics), so a healthy monitor is flagged with
probability alpha.

Actuator rules, first match wins: ``untested`` (its board cannot be read), ``driver_fault`` (the
output sense misses the command by more than one DAC LSB plus k sense-noise sigmas: a dead stage,
a short that sags, a railed channel), ``unobservable`` (no monitor sees it, or the operating point
gives no first-order response to test), ``no_response`` (optical response below k sigma of its own
noise while the drive is fine), ``drifted`` (response off the calibrated prediction by more than k
sigma and a relative tolerance), else ``ok``.

Monitor rules, first match wins: ``saturated`` (readings at the top of the range), ``dead`` (no
response to known light: it reads the dark level), ``frozen`` (it reads light, but every reading -
lit and each scan frame - stays within one ADC LSB while neighbouring monitors' light changed),
``noisy``, else ``ok``. A monitor that no light reaches at the operating point can only be checked
for saturation and noise (:func:`dark_monitor_verdict`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import constants
from scipy.stats import chi2

from meshwarden.procedures.inputs import ProcedureInputError, float_vector, non_negative, positive, same_length
from meshwarden.procedures.quality import plain_dict

ACTUATOR_VERDICTS = ("ok", "no_response", "driver_fault", "drifted", "unobservable", "untested")
MONITOR_VERDICTS = ("ok", "dead", "saturated", "noisy", "frozen")


def shot_noise_a(photocurrent_a: float, dark_current_a: float, bandwidth_hz: float) -> float:
    """rms shot noise current sqrt(2 q (I_p + I_d) B)."""
    total = non_negative("photocurrent_a", photocurrent_a) + non_negative("dark_current_a", dark_current_a)
    return math.sqrt(2.0 * constants.e * total * positive("bandwidth_hz", bandwidth_hz))


def feedback_resistor_noise_a(resistance_ohm: float, temperature_k: float, bandwidth_hz: float) -> float:
    """rms Johnson noise current of the feedback resistor sqrt(4 k T B / R_f)."""
    kt = constants.k * positive("temperature_k", temperature_k)
    return math.sqrt(4.0 * kt * positive("bandwidth_hz", bandwidth_hz) / positive("resistance_ohm", resistance_ohm))


def dac_lsb_volts(full_scale_volts: float, bits: int) -> float:
    """One DAC step, FS / 2^N (the convention of Kester, MT-001, as in the mapping layer)."""
    if isinstance(bits, bool) or not isinstance(bits, int) or bits < 1:
        raise ProcedureInputError(f"bits must be an integer >= 1, got {bits!r}")
    return positive("full_scale_volts", full_scale_volts) / (1 << bits)


def detector_noise_a(
    photocurrent_a: float,
    dark_current_a: float,
    bandwidth_hz: float,
    feedback_ohm: float,
    temperature_k: float,
    adc_lsb_a: float = 0.0,
) -> float:
    """Expected rms noise of one monitor reading: shot, feedback-resistor and quantisation in quadrature."""
    shot = shot_noise_a(photocurrent_a, dark_current_a, bandwidth_hz)
    johnson = feedback_resistor_noise_a(feedback_ohm, temperature_k, bandwidth_hz)
    quantisation = non_negative("adc_lsb_a", adc_lsb_a) / math.sqrt(12.0)
    return math.sqrt(shot**2 + johnson**2 + quantisation**2)


def noise_threshold(expected_sigma: float, samples: int, false_alarm: float = 1e-6) -> float:
    """Sample standard deviation above which noise exceeds ``expected_sigma`` at the given false-alarm rate."""
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 2:
        raise ProcedureInputError(f"samples must be an integer >= 2, got {samples!r}")
    if not 0.0 < false_alarm < 1.0:
        raise ProcedureInputError(f"false_alarm must lie in (0, 1), got {false_alarm!r}")
    dof = samples - 1
    return positive("expected_sigma", expected_sigma) * math.sqrt(float(chi2.ppf(1.0 - false_alarm, dof)) / dof)


@dataclass(frozen=True)
class Verdict:
    """One pinned verdict name, why, and the numbers it rests on."""

    verdict: str
    reason: str
    evidence: dict[str, float] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return plain_dict({"verdict": self.verdict, "reason": self.reason, "evidence": self.evidence})


def actuator_verdict(
    *,
    readable: bool,
    commanded_volts: Any = (),
    sense_volts: Any = (),
    lsb_volts: float = 0.0,
    sense_noise_volts: float = 0.0,
    response: float = 0.0,
    response_se: float = 1.0,
    predicted: float | None = None,
    unobservable_reason: str = "",
    k_sigma: float = 5.0,
    drift_rel: float = 0.2,
    crosstalk_bound: float = 0.0,
) -> Verdict:
    """Verdict for one actuator from its sense readings at test codes and its estimated optical response.

    ``response`` and ``response_se`` come from a scan design (:mod:`.designs`); ``predicted`` is what the
    calibration expects at the operating point (None when no calibration applies). ``crosstalk_bound`` is the
    largest response its step could cause through its neighbours alone (their fringing fields move them when
    its drive changes): a response not clear of it by k sigma proves nothing about the actuator itself.
    """
    if not readable:
        return Verdict("untested", "its board cannot be read")
    commanded = float_vector("commanded_volts", commanded_volts)
    sensed = float_vector("sense_volts", sense_volts)
    same_length("commanded_volts", commanded, "sense_volts", sensed)
    k = positive("k_sigma", k_sigma)
    tolerance = non_negative("lsb_volts", lsb_volts) + k * non_negative("sense_noise_volts", sense_noise_volts)
    miss = float(np.max(np.abs(sensed - commanded)))
    evidence = {"max_sense_error_v": miss, "sense_tolerance_v": tolerance}
    if miss > tolerance:
        return Verdict(
            "driver_fault", f"output sense misses the command by {miss:.4g} V (tolerance {tolerance:.4g})", evidence
        )
    if unobservable_reason:
        return Verdict("unobservable", unobservable_reason, evidence)
    sigma = positive("response_se", response_se)
    evidence |= {"response": float(response), "response_se": sigma, "response_sigmas": abs(response) / sigma}
    if predicted is not None:
        evidence |= {"predicted": float(predicted), "predicted_sigmas": abs(predicted) / sigma}
        if abs(predicted) < k * sigma:
            return Verdict("unobservable", "the operating point gives no first-order response to test", evidence)
    if abs(response) < k * sigma:
        return Verdict("no_response", f"optical response {abs(response) / sigma:.3g} sigma (need {k:g})", evidence)
    bound = non_negative("crosstalk_bound", crosstalk_bound)
    if bound > 0.0:
        evidence["crosstalk_bound"] = bound
        if abs(response) < bound + k * sigma:
            return Verdict(
                "unobservable",
                f"its response ({abs(response) / sigma:.3g} sigma) is no more than its neighbours could give through "
                f"crosstalk ({bound / sigma:.3g} sigma): it cannot be told from a stuck one",
                evidence,
            )
    if predicted is not None:
        allowed = max(k * sigma, non_negative("drift_rel", drift_rel) * abs(predicted))
        evidence["drift_allowed"] = allowed
        if abs(response - predicted) > allowed:
            return Verdict("drifted", f"response {response:.4g} against {predicted:.4g} calibrated", evidence)
    return Verdict("ok", "", evidence)


def monitor_verdict(
    *,
    dark_a: Any,
    lit_a: Any,
    frame_levels_a: Any,
    full_scale_a: float,
    dark_noise_a: float,
    lit_noise_a: float,
    neighbours_changed: bool,
    adc_lsb_a: float = 0.0,
    k_sigma: float = 5.0,
    saturation_fraction: float = 0.98,
    false_alarm: float = 1e-6,
) -> Verdict:
    """Verdict for one monitor from samples in the dark, samples under known light, and one reading per scan frame."""
    dark = float_vector("dark_a", dark_a, min_length=2)
    lit = float_vector("lit_a", lit_a, min_length=2)
    levels = float_vector("frame_levels_a", frame_levels_a)
    top = positive("full_scale_a", full_scale_a)
    response = float(lit.mean() - dark.mean())
    noise_floor = positive("dark_noise_a", dark_noise_a)
    dark_limit = noise_threshold(noise_floor, dark.size, false_alarm)
    lit_limit = noise_threshold(positive("lit_noise_a", lit_noise_a), lit.size, false_alarm)
    everything = np.concatenate([lit, levels])  # its own readings (the dark level may come from elsewhere)
    spread = float(everything.max() - everything.min())
    evidence = {
        "dark_mean_a": float(dark.mean()),
        "lit_mean_a": float(lit.mean()),
        "response_a": response,
        "max_reading_a": float(max(lit.max(), levels.max())),
        "full_scale_a": top,
        "dark_std_a": float(dark.std(ddof=1)),
        "dark_std_limit_a": dark_limit,
        "lit_std_a": float(lit.std(ddof=1)),
        "lit_std_limit_a": lit_limit,
        "spread_a": spread,
    }
    noisy = evidence["dark_std_a"] > dark_limit or evidence["lit_std_a"] > lit_limit
    if evidence["max_reading_a"] >= saturation_fraction * top:
        if noisy and float(np.median(everything)) < saturation_fraction * top:
            # not pinned at the top: its own noise carries some readings there
            return Verdict(
                "noisy",
                "noise above the detector's expected shot and thermal noise, reaching the top of its range at times",
                evidence,
            )
        return Verdict("saturated", f"reads {evidence['max_reading_a']:.4g} A of a {top:.4g} A range", evidence)
    if response < positive("k_sigma", k_sigma) * noise_floor:
        return Verdict("dead", f"known light moves it by {response:.3g} A (need {k_sigma * noise_floor:.3g})", evidence)
    if neighbours_changed and spread <= non_negative("adc_lsb_a", adc_lsb_a):
        return Verdict("frozen", "its readings do not change while its neighbours' light does", evidence)
    if noisy:
        return Verdict("noisy", "noise above the detector's expected shot and thermal noise", evidence)
    return Verdict("ok", "", evidence)


def dark_monitor_verdict(
    *,
    dark_a: Any,
    full_scale_a: float,
    dark_noise_a: float,
    saturation_fraction: float = 0.98,
    false_alarm: float = 1e-6,
    unlit_reason: str = "no light reaches it at this operating point",
) -> Verdict:
    """Verdict for a monitor no (or too little) light reaches at the operating point: only saturation and
    noise can be tested.

    ``ok`` here says so in its reason: a dead detector reads its dark level too.
    """
    dark = float_vector("dark_a", dark_a, min_length=2)
    top = positive("full_scale_a", full_scale_a)
    limit = noise_threshold(positive("dark_noise_a", dark_noise_a), dark.size, false_alarm)
    evidence = {
        "dark_mean_a": float(dark.mean()),
        "max_reading_a": float(dark.max()),
        "full_scale_a": top,
        "dark_std_a": float(dark.std(ddof=1)),
        "dark_std_limit_a": limit,
    }
    if evidence["max_reading_a"] >= saturation_fraction * top:
        if evidence["dark_std_a"] > limit and float(np.median(dark)) < saturation_fraction * top:
            return Verdict(
                "noisy",
                "noise above the detector's expected dark noise, reaching the top of its range at times",
                evidence,
            )
        return Verdict("saturated", f"reads {evidence['max_reading_a']:.4g} A of a {top:.4g} A range", evidence)
    if evidence["dark_std_a"] > limit:
        return Verdict("noisy", "noise above the detector's expected dark noise", evidence)
    return Verdict("ok", f"{unlit_reason}: only saturation and noise were tested", evidence)


def conserved_light_check(
    *,
    own_change_a: float,
    own_uncertainty_a: float,
    others_change_w: float,
    others_uncertainty_w: float,
    responsivity_a_per_w: float,
    loss_floor: float = 0.5,
) -> tuple[str, dict[str, float]]:
    """Whether a monitor followed a coupler's move: ("moved" | "missed" | "untestable", evidence).

    A lossless coupler conserves power (its matrix is unitary), so when it moves, the taps its outputs reach change
    by amounts that add up to zero: this monitor should change by minus the others' total
    (``others_change_w``, in watts at the taps). Paths to different taps lose a little differently (a MEMS phase
    arm 0.1-0.3 dB: common practice), so at least ``loss_floor`` (0.5: 3 dB) of that share must arrive. A reading
    change is known to within ``own_uncertainty_a`` (its ADC step and k sigma of its noise), the others' total
    within ``others_uncertainty_w``. "moved": the reading changed beyond its uncertainty; "missed": the least a
    working monitor would have changed by is more than twice its uncertainty, yet it did not change beyond it;
    else "untestable" (too little light moved).
    """
    own_unc = positive("own_uncertainty_a", own_uncertainty_a)
    others_unc = non_negative("others_uncertainty_w", others_uncertainty_w)
    least = (
        non_negative("loss_floor", loss_floor)
        * max(abs(others_change_w) - others_unc, 0.0)
        * positive("responsivity_a_per_w", responsivity_a_per_w)
    )
    evidence = {
        "look_change_a": float(own_change_a),
        "look_uncertainty_a": own_unc,
        "look_least_expected_a": least,
        "look_others_change_w": float(others_change_w),
        "look_others_uncertainty_w": others_unc,
    }
    if abs(own_change_a) > own_unc:
        return "moved", evidence
    if least > 2.0 * own_unc:
        return "missed", evidence
    return "untestable", evidence
