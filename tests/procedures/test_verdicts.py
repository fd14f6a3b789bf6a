"""Scan verdict rules and the detector noise formulas they rest on."""

from __future__ import annotations

import numpy as np
import pytest

from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.verdicts import (
    ACTUATOR_VERDICTS,
    MONITOR_VERDICTS,
    actuator_verdict,
    dac_lsb_volts,
    dark_monitor_verdict,
    detector_noise_a,
    feedback_resistor_noise_a,
    monitor_verdict,
    noise_threshold,
    shot_noise_a,
)


def test_shot_noise_published_value() -> None:
    """sqrt(2 q I B): 1 uA over 1 MHz -> 0.56607 nA rms. Source: Schottky shot noise (standard; PHYSICS.md)."""
    assert shot_noise_a(1e-6, 0.0, 1e6) == pytest.approx(0.56607e-9, rel=1e-5)


def test_feedback_resistor_noise_published_value() -> None:
    """sqrt(4 k T B / R_f): 100 kOhm, 300 K, 1 MHz -> 0.40704 nA rms. Source: Johnson 1928; Nyquist 1928."""
    assert feedback_resistor_noise_a(100e3, 300.0, 1e6) == pytest.approx(0.40704e-9, rel=1e-5)


def test_detector_noise_adds_independent_sources_in_quadrature() -> None:
    """Shot (0.56607 nA) and Johnson (0.40704 nA) noise combine to sqrt(0.56607^2 + 0.40704^2) = 0.69722 nA, and a
    quantisation LSB adds LSB / sqrt(12) (Kester, Analog Devices MT-001)."""
    assert detector_noise_a(1e-6, 0.0, 1e6, 100e3, 300.0) == pytest.approx(0.69722e-9, rel=1e-4)
    with_adc = detector_noise_a(1e-6, 0.0, 1e6, 100e3, 300.0, adc_lsb_a=1e-9)
    assert with_adc == pytest.approx(np.sqrt(0.69722e-9**2 + 1e-18 / 12), rel=1e-4)


def test_dac_lsb_published_value() -> None:
    """16 bit over 60 V -> 0.9155 mV per step. Source: Kester, Analog Devices MT-001 (LSB = FS / 2^N)."""
    assert dac_lsb_volts(60.0, 16) == pytest.approx(0.9155e-3, rel=1e-4)


def test_noise_threshold_false_alarm_rate() -> None:
    """Healthy Gaussian noise passes the chi-square bound at its stated rate (alpha = 0.02 over 3000 trials, Monte
    Carlo against the sample-variance distribution), and noise 2x larger is flagged almost always."""
    rng = np.random.default_rng(11)
    limit = noise_threshold(1.0, 64, false_alarm=0.02)
    healthy = rng.normal(0.0, 1.0, size=(3000, 64)).std(axis=1, ddof=1)
    noisy = rng.normal(0.0, 2.0, size=(3000, 64)).std(axis=1, ddof=1)
    assert 0.012 < np.mean(healthy > limit) < 0.03  # binomial sd ~0.0026 around 0.02
    assert np.mean(noisy > limit) > 0.999


def _actuator(**changes: object) -> dict[str, object]:
    base: dict[str, object] = {
        "readable": True,
        "commanded_volts": [0.0, 2.0, 4.0],
        "sense_volts": [0.001, 2.0, 3.999],
        "lsb_volts": 0.9155e-3,
        "sense_noise_volts": 2e-3,
        "response": 40e-9,
        "response_se": 1e-9,
        "predicted": 42e-9,
    }
    return base | changes


@pytest.mark.parametrize(
    ("changes", "verdict"),
    [
        ({}, "ok"),
        ({"readable": False}, "untested"),
        ({"sense_volts": [0.0, 0.0, 0.0]}, "driver_fault"),  # dead output stage
        ({"sense_volts": [0.0, 1.4, 2.8]}, "driver_fault"),  # short that sags the output
        ({"sense_volts": [60.0, 60.0, 60.0]}, "driver_fault"),  # railed channel
        ({"response": 2e-9}, "no_response"),
        ({"response": 20e-9}, "drifted"),
        ({"response": -40e-9}, "drifted"),
        ({"unobservable_reason": "no monitor downstream"}, "unobservable"),
        ({"predicted": 1e-9, "response": 0.5e-9}, "unobservable"),
        ({"predicted": None, "response": 3e-9}, "no_response"),
        ({"predicted": None}, "ok"),
    ],
)
def test_actuator_rules(changes: dict[str, object], verdict: str) -> None:
    """Each fault pattern gives its pinned verdict, with evidence numbers when the drive was read."""
    result = actuator_verdict(**_actuator(**changes))  # type: ignore[arg-type]
    assert result.verdict == verdict, result
    assert result.verdict in ACTUATOR_VERDICTS
    if verdict != "untested":
        assert all(isinstance(v, float) for v in result.evidence.values())
        assert "max_sense_error_v" in result.evidence


def test_sense_noise_alone_never_looks_like_a_driver_fault() -> None:
    """A healthy channel read with 2 mV Gaussian sense noise passes the 1 LSB + 5 sigma tolerance in 2000 draws."""
    rng = np.random.default_rng(5)
    commanded = np.linspace(0.0, 5.0, 6)
    for _ in range(2000):
        sensed = commanded + rng.normal(0.0, 2e-3, 6)
        assert actuator_verdict(**_actuator(sense_volts=sensed, commanded_volts=commanded)).verdict == "ok"  # type: ignore[arg-type]


def _monitor(**changes: object) -> dict[str, object]:
    rng = np.random.default_rng(2)
    sigma = 1e-9
    base: dict[str, object] = {
        "dark_a": 5e-9 + rng.normal(0, sigma, 64),
        "lit_a": 200e-9 + rng.normal(0, sigma, 64),
        "frame_levels_a": 180e-9 + 30e-9 * rng.random(16),
        "full_scale_a": 1e-6,
        "dark_noise_a": sigma,
        "lit_noise_a": sigma,
        "neighbours_changed": True,
        "adc_lsb_a": 1e-12,
    }
    return base | changes


@pytest.mark.parametrize(
    ("changes", "verdict"),
    [
        ({}, "ok"),
        ({"lit_a": np.full(64, 1e-6)}, "saturated"),
        ({"lit_a": 5e-9 + np.random.default_rng(3).normal(0, 1e-9, 64)}, "dead"),
        ({"lit_a": np.full(64, 7e-8), "frame_levels_a": np.full(16, 7e-8)}, "frozen"),
        ({"lit_a": 200e-9 + np.random.default_rng(4).normal(0, 4e-9, 64)}, "noisy"),
        ({"dark_a": 5e-9 + np.random.default_rng(4).normal(0, 4e-9, 64)}, "noisy"),
    ],
)
def test_monitor_rules(changes: dict[str, object], verdict: str) -> None:
    """Each monitor fault pattern gives its pinned verdict with its evidence."""
    result = monitor_verdict(**_monitor(**changes))  # type: ignore[arg-type]
    assert result.verdict == verdict, result
    assert result.verdict in MONITOR_VERDICTS
    assert result.evidence["full_scale_a"] == 1e-6


def test_noise_that_reaches_the_top_at_times_is_noisy_and_a_pinned_reading_saturated() -> None:
    """A detector whose noise (0.4 uA rms on 0.2 uA of light, a 1 uA range) carries some readings to the top of
    its range, clipped there as an ADC does, is noisy, not saturated; one pinned at the top (most readings there) is
    saturated even when noisy. Saturation pins the output at the rail, noise only visits it (common practice)."""
    rng = np.random.default_rng(7)
    visits = {
        k: np.clip(level + rng.normal(0, 4e-7, 64), 0.0, 1e-6) for k, level in (("dark_a", 5e-9), ("lit_a", 2e-7))
    }
    assert max(v.max() for v in visits.values()) >= 0.98e-6  # the top is reached
    assert monitor_verdict(**_monitor(**visits)).verdict == "noisy"  # type: ignore[arg-type]
    assert dark_monitor_verdict(dark_a=visits["dark_a"], full_scale_a=1e-6, dark_noise_a=1e-9).verdict == "noisy"
    pinned = {k: np.clip(2e-6 + rng.normal(0, 4e-7, 64), 0.0, 1e-6) for k in ("dark_a", "lit_a")}
    assert monitor_verdict(**_monitor(**pinned)).verdict == "saturated"  # type: ignore[arg-type]
    assert dark_monitor_verdict(dark_a=pinned["dark_a"], full_scale_a=1e-6, dark_noise_a=1e-9).verdict == "saturated"


def test_constant_readings_without_changing_neighbours_are_not_called_frozen() -> None:
    """Frozen needs evidence that the light around the monitor changed; without it a flat monitor is dead."""
    flat = {"dark_a": np.full(64, 7e-8), "lit_a": np.full(64, 7e-8), "frame_levels_a": np.full(16, 7e-8)}
    assert monitor_verdict(**_monitor(**flat, neighbours_changed=False)).verdict == "dead"  # type: ignore[arg-type]


def test_a_monitor_at_its_dark_level_is_dead_not_frozen() -> None:
    """A detector that reads only the dark level is dead even while its neighbours' light changes."""
    flat = {"lit_a": np.full(64, 5e-9), "frame_levels_a": np.full(16, 5e-9)}
    assert monitor_verdict(**_monitor(**flat)).verdict == "dead"  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("dark", "verdict"),
    [
        (5e-9 + np.random.default_rng(5).normal(0, 1e-9, 8), "ok"),
        (5e-9 + np.random.default_rng(6).normal(0, 5e-9, 8), "noisy"),
        (np.full(8, 1e-6), "saturated"),
    ],
)
def test_dark_monitor_rules(dark: object, verdict: str) -> None:
    """A monitor no light reaches is tested for saturation and noise only, and ok says so."""
    result = dark_monitor_verdict(dark_a=dark, full_scale_a=1e-6, dark_noise_a=1e-9)
    assert result.verdict == verdict, result
    if verdict == "ok":
        assert "only saturation and noise" in result.reason


def test_verdict_as_dict_is_plain() -> None:
    """as_dict gives the pinned keys verdict, reason and evidence with plain floats."""
    data = actuator_verdict(**_actuator()).as_dict()  # type: ignore[arg-type]
    assert set(data) == {"verdict", "reason", "evidence"}
    assert all(type(v) is float for v in data["evidence"].values())


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: shot_noise_a(-1e-6, 0.0, 1e6), "photocurrent_a"),
        (lambda: feedback_resistor_noise_a(0.0, 300.0, 1e6), "resistance_ohm"),
        (lambda: noise_threshold(1.0, 1), "samples"),
        (lambda: noise_threshold(1.0, 10, false_alarm=1.5), "false_alarm"),
        (lambda: dac_lsb_volts(60.0, 0), "bits"),
        (lambda: actuator_verdict(**_actuator(sense_volts=[1.0])), "3 points but sense_volts has 1"),  # type: ignore[arg-type]
    ],
)
def test_bad_verdict_inputs_are_refused(call: object, message: str) -> None:
    """Each bad input raises ProcedureInputError with a specific message."""
    with pytest.raises(ProcedureInputError, match=message):
        call()  # type: ignore[operator]
