"""Photodetector, noise and converter figures against their published values, and statistically."""

from __future__ import annotations

import math

import numpy as np
import pytest

from meshsim.physics import detectors as det


def test_responsivity_check_value() -> None:
    """R = eta q lambda / (h c): eta = 0.8 at 1550 nm -> 1.0001 A/W (standard; scipy.constants)."""
    assert det.responsivity_a_per_w(0.8, 1550e-9) == pytest.approx(1.0001, abs=1e-4)


def test_shot_noise_check_value() -> None:
    """sqrt(2 q I B): 1 uA, 1 MHz -> 0.56607 nA rms (Schottky)."""
    assert float(det.shot_noise_amps(1e-6, 1e6)) == pytest.approx(0.56607e-9, rel=1e-4)


def test_thermal_noise_check_value() -> None:
    """sqrt(4 k T B / R): 100 kOhm, 300 K, 1 MHz -> 0.40704 nA (Johnson 1928; Nyquist 1928)."""
    assert float(det.thermal_noise_amps(1e5, 1e6, 300.0)) == pytest.approx(0.40704e-9, rel=1e-4)


def test_germanium_detector_defaults_in_published_range() -> None:
    """The demo detector's responsivity lies in 0.8-1.0 A/W and its dark current in nA-uA
    (germanium at 1550 nm: Michel, Liu, Kimerling, Nat. Photonics 4:527, 2010)."""
    from meshsim.params import Detectors

    d = Detectors()
    assert 0.8 <= det.responsivity_a_per_w(d.quantum_efficiency, 1550e-9) <= 1.0
    assert 1e-9 <= d.dark_current_a <= 1e-6


def _counts_std(power_w: float, dark_a: float, gain: float, integration_s: float, n: int = 40000) -> float:
    rng = np.random.default_rng(11)
    counts = det.detect(np.full(n, power_w), 1.0, dark_a, gain, integration_s, 24, 10.0, rng)
    return float(counts.std() * 10.0 / (1 << 24) / gain)  # back to amps


def test_shot_noise_statistics() -> None:
    """With a bright signal the spread of many reads matches sqrt(2 q I B), B = 1/(2 T)."""
    integration = 1e-6
    bandwidth = det.noise_bandwidth_hz(integration)
    current = 1e-3
    expected = math.sqrt(
        float(det.shot_noise_amps(current, bandwidth)) ** 2 + float(det.thermal_noise_amps(1e3, bandwidth)) ** 2
    )
    assert float(det.shot_noise_amps(current, bandwidth)) > 3 * float(det.thermal_noise_amps(1e3, bandwidth))
    assert _counts_std(current, 0.0, 1e3, integration) == pytest.approx(expected, rel=0.03)


def test_thermal_noise_statistics() -> None:
    """In the dark with a small dark current the spread matches sqrt(4 k T B / R_f)."""
    integration = 1e-6
    bandwidth = det.noise_bandwidth_hz(integration)
    expected = math.sqrt(
        float(det.thermal_noise_amps(1e3, bandwidth)) ** 2 + float(det.shot_noise_amps(1e-6, bandwidth)) ** 2
    )
    assert float(det.thermal_noise_amps(1e3, bandwidth)) > 3 * float(det.shot_noise_amps(1e-6, bandwidth))
    assert _counts_std(0.0, 1e-6, 1e3, integration) == pytest.approx(expected, rel=0.03)


def test_adc_saturates_at_the_top_code() -> None:
    """A bright input reads the top code, never more (common practice for a clipping ADC)."""
    counts = det.detect(np.array([1.0]), 1.0, 0.0, 1e5, 1e-3, 16, 2.5, np.random.default_rng(0))
    assert int(counts[0]) == 65535


def test_dac_lsb_check_value() -> None:
    """LSB = FS / 2^N: 16 bit, 60 V -> 0.9155 mV; quantisation noise LSB/sqrt(12).
    Source: Kester, Analog Devices MT-001 (convention 2^N)."""
    from tests.sim.helpers import small_rack

    rack, _ = small_rack()
    assert rack.board("b0").lsb_volts == pytest.approx(0.9155e-3, rel=1e-4)
