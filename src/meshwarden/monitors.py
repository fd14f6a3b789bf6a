"""Photodetector readings: ADC counts -> photocurrent -> optical power. Pure.

counts / 2^N x ADC full scale = amplifier volts; / transimpedance = photocurrent (A);
(photocurrent - dark current) / responsivity = optical power (W) at the detector (standard).
``amps`` is the raw photocurrent; ``watts`` takes out the monitor's configured dark current
(``dark_current_a``: the detector's datasheet value, or better a dark frame read with the light
blocked; 0 when not configured). Near the dark level ``watts`` may read slightly below 0: noise
is left as it is, never clipped, so averages stay unbiased.
"""

from __future__ import annotations

from meshwarden.config.model import MonitorConfig


def reading(counts: float, monitor: MonitorConfig, adc_bits: int, adc_full_scale_volts: float) -> dict[str, float]:
    """The ``{"amps", "watts", "counts"}`` of one monitor."""
    volts = counts / (1 << adc_bits) * adc_full_scale_volts
    amps = volts / monitor.transimpedance_ohms
    return {"amps": amps, "watts": (amps - monitor.dark_current_a) / monitor.responsivity_a_per_w, "counts": counts}
