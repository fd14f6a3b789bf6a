"""Photodetector, transimpedance amplifier and ADC of one monitor input.

* Responsivity R = eta q lambda / (h c) A/W (standard; constants from scipy.constants).
* Shot noise current sqrt(2 q (I_p + I_d) B) rms (Schottky).
* Feedback-resistor thermal noise current sqrt(4 k T B / R_f) rms (Johnson 1928; Nyquist 1928).
* Noise bandwidth of an integrate-and-dump of length T: B = 1 / (2 T) (standard).
* The amplifier output I R_f is quantised by an N-bit ADC over [0, full scale): counts =
  floor(V / FS * 2^N), clipped to [0, 2^N - 1], so a bright input saturates at the top code.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.constants import Boltzmann, c, elementary_charge, h

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def responsivity_a_per_w(quantum_efficiency: float, wavelength_m: float) -> float:
    """Ideal responsivity of a photodiode of quantum efficiency eta at ``wavelength_m``."""
    return float(quantum_efficiency * elementary_charge * wavelength_m / (h * c))


def shot_noise_amps(current_a: ArrayLike, bandwidth_hz: float) -> FloatArray:
    """RMS shot-noise current of a DC current in a bandwidth."""
    return np.asarray(np.sqrt(2.0 * elementary_charge * np.abs(np.asarray(current_a, dtype=float)) * bandwidth_hz))


def thermal_noise_amps(resistance_ohms: ArrayLike, bandwidth_hz: float, temperature_k: float = 300.0) -> FloatArray:
    """RMS Johnson-Nyquist noise current of a resistor."""
    return np.asarray(
        np.sqrt(4.0 * Boltzmann * temperature_k * bandwidth_hz / np.asarray(resistance_ohms, dtype=float))
    )


def noise_bandwidth_hz(integration_s: float) -> float:
    """Equivalent noise bandwidth of averaging over ``integration_s``."""
    return 1.0 / (2.0 * integration_s)


def detect(
    power_w: ArrayLike,
    responsivity: ArrayLike,
    dark_a: ArrayLike,
    gain_ohms: ArrayLike,
    integration_s: float,
    adc_bits: int,
    adc_full_scale_v: float,
    rng: np.random.Generator,
    temperature_k: float = 300.0,
    extra_noise_a: ArrayLike = 0.0,
) -> IntArray:
    """ADC counts for optical powers at the monitor inputs, with shot and thermal noise."""
    photo = np.asarray(responsivity) * np.asarray(power_w, dtype=float) + np.asarray(dark_a)
    bandwidth = noise_bandwidth_hz(integration_s)
    sigma = np.sqrt(
        shot_noise_amps(photo, bandwidth) ** 2
        + thermal_noise_amps(gain_ohms, bandwidth, temperature_k) ** 2
        + np.asarray(extra_noise_a, dtype=float) ** 2
    )
    current = photo + sigma * rng.standard_normal(photo.shape)
    volts = current * np.asarray(gain_ohms)
    top = (1 << adc_bits) - 1
    counts = np.floor(volts / adc_full_scale_v * (1 << adc_bits))
    return np.asarray(np.clip(counts, 0, top).astype(np.int64))
