"""Where on its calibration table an actuator can carry a lock: the table's local slope, the usable
band, and the volts of a value inside it. Pure: they read an ActuatorMap, nothing else."""

from __future__ import annotations

import numpy as np

from meshwarden.mapping import ActuatorMap


def calibrated_slope(amap: ActuatorMap, volts: float) -> float:
    """The calibrated value per volt at ``volts`` (central difference within the table)."""
    top = float(amap.table.volts[-1])
    h = 0.01
    lo, hi = max(volts - h, 0.0), min(volts + h, top)
    if hi <= lo:
        return 0.0
    return float((amap.value_at(hi) - amap.value_at(lo)) / (hi - lo))


def usable_band(amap: ActuatorMap, kind: str) -> tuple[float, float]:
    """Volts between which the table's slope is at least a quarter of its steepest (phase), or the
    whole table within the limit (coupler)."""
    top = float(amap.top_volts)
    if kind != "phase":
        return 0.02 * top, top
    grid = np.linspace(0.0, top, 201)
    slopes = np.array([calibrated_slope(amap, float(v)) for v in grid])
    usable = np.nonzero(slopes >= 0.25 * slopes.max())[0]
    return float(grid[usable[0]]), top


def volts_at(amap: ActuatorMap, value: float, low: float, high: float) -> float | None:
    """Volts within [low, high] where the (rising) table reaches ``value``, by bisection; None if outside."""
    if not amap.value_at(low) <= value <= amap.value_at(high):
        return None
    a, b = low, high
    for _ in range(60):
        mid = 0.5 * (a + b)
        if amap.value_at(mid) < value:
            a = mid
        else:
            b = mid
    return 0.5 * (a + b)
