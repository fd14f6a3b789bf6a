"""Photodetector readings: ADC counts -> photocurrent -> optical power. Pure.

counts / 2^N x ADC full scale = amplifier volts; / transimpedance = photocurrent (A);
/ responsivity = optical power (W) at the detector (standard; the dark current is not
subtracted - it is below the noise of a useful reading and drifts with temperature).
"""

from __future__ import annotations

from meshwarden.config.model import MonitorConfig


def reading(counts: float, monitor: MonitorConfig, adc_bits: int, adc_full_scale_volts: float) -> dict[str, float]:
    """The ``{"amps", "watts", "counts"}`` of one monitor."""
    volts = counts / (1 << adc_bits) * adc_full_scale_volts
    amps = volts / monitor.transimpedance_ohms
    return {"amps": amps, "watts": amps / monitor.responsivity_a_per_w, "counts": counts}
