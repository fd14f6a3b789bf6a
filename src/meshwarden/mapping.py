"""Logical values <-> volts <-> DAC codes. Pure: no I/O, no clock.

* Volts -> value interpolates the actuator's calibration table with a monotone piecewise-cubic
  Hermite interpolant (scipy's PCHIP, Fritsch & Carlson 1980): it never overshoots between
  points, so a monotone table gives a monotone, invertible curve.
* Value -> volts solves that same interpolant, so that value -> volts -> value returns the value
  exactly, up to the DAC's quantisation - no second, slightly different inverse table. The
  interpolant's per-segment cubic coefficients are taken from scipy once, when the table is
  loaded; evaluating and inverting them is then plain arithmetic per call (a segment found by
  bisection on the knots, the cubic solved in it by safeguarded Newton steps), with no scipy
  call on the request path.
* A phase is taken modulo 2 pi and the lowest-voltage solution within the actuator's hard limit
  is used: less voltage means less charging and more distance from pull-in.
* Codes: an N-bit DAC of full scale FS outputs code * FS / 2^N volts (LSB = FS / 2^N, the
  convention of Kester, Analog Devices MT-001); volts are rounded to the nearest code, halves up.

A value the calibration cannot reach within the hard limit is refused with the reachable range.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field

import numpy as np
from scipy.interpolate import PchipInterpolator

from meshwarden.calibration import CalibrationTable
from meshwarden.errors import LimitRefused, UnreachableRefused

TWO_PI = 2.0 * math.pi


def volts_to_code(volts: float, full_scale_volts: float, bits: int) -> int:
    """Nearest DAC code to ``volts`` (halves round up); volts outside [0, FS) are the guard's job."""
    return math.floor(volts * (1 << bits) / full_scale_volts + 0.5)


def code_to_volts(code: int, full_scale_volts: float, bits: int) -> float:
    """Output volts of a DAC code."""
    return code * full_scale_volts / (1 << bits)


@dataclass(frozen=True)
class ActuatorMap:
    """The calibrated curve of one actuator, cut at its hard limit."""

    actuator_id: str
    kind: str
    table: CalibrationTable
    hard_limit_volts: float
    _knots: tuple[float, ...] = field(init=False, repr=False, compare=False)
    _knot_values: tuple[float, ...] = field(init=False, repr=False, compare=False)
    _coefficients: tuple[tuple[float, float, float, float], ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        curve = PchipInterpolator(np.array(self.table.volts), np.array(self.table.values))
        # scipy's local power basis: y = c0 dx^3 + c1 dx^2 + c2 dx + c3, dx = v - knot[i]
        coefficients = tuple(tuple(float(c) for c in column) for column in np.asarray(curve.c).T)
        object.__setattr__(self, "_knots", tuple(self.table.volts))
        object.__setattr__(self, "_knot_values", tuple(self.table.values))
        object.__setattr__(self, "_coefficients", coefficients)

    def _curve(self, volts: float) -> float:
        i = min(max(bisect.bisect_right(self._knots, volts) - 1, 0), len(self._coefficients) - 1)
        c0, c1, c2, c3 = self._coefficients[i]
        dx = volts - self._knots[i]
        return ((c0 * dx + c1) * dx + c2) * dx + c3

    def _solve(self, wanted: float) -> float:
        """The volts where the curve equals ``wanted`` (a value within the table's range)."""
        i = min(max(bisect.bisect_right(self._knot_values, wanted) - 1, 0), len(self._coefficients) - 1)
        c0, c1, c2, c3 = self._coefficients[i]
        low, high = 0.0, self._knots[i + 1] - self._knots[i]
        dx = (wanted - self._knot_values[i]) / (self._knot_values[i + 1] - self._knot_values[i]) * high
        for _ in range(100):
            f = ((c0 * dx + c1) * dx + c2) * dx + c3 - wanted
            if f == 0.0:
                break
            if f > 0.0:
                high = dx
            else:
                low = dx
            slope = (3.0 * c0 * dx + 2.0 * c1) * dx + c2
            step = dx - f / slope if slope > 0.0 else -1.0
            dx = step if low <= step <= high else 0.5 * (low + high)
            if high - low < 1e-13 or abs(f) < 1e-15:
                break
        return self._knots[i] + dx

    @property
    def top_volts(self) -> float:
        """The highest voltage that is both calibrated and within the hard limit."""
        return min(self.table.volts[-1], self.hard_limit_volts)

    def value_at(self, volts: float) -> float:
        """Logical value (kappa, or phase in rad) at ``volts``; outside the table is an error."""
        if not 0.0 <= volts <= self.table.volts[-1] + 1e-12:
            raise LimitRefused(
                f"{self.actuator_id}: {volts:.6g} V is outside its calibration (0 to {self.table.volts[-1]:g} V)",
                actuator=self.actuator_id,
                volts=volts,
            )
        return self._curve(volts)

    def reachable(self) -> tuple[float, float]:
        """The range of values reachable from 0 V up to :attr:`top_volts`."""
        return self._curve(0.0), self._curve(self.top_volts)

    def volts_for(self, value: float) -> float:
        """Volts that give ``value``; for phases the lowest-voltage solution modulo 2 pi."""
        if not math.isfinite(value):
            raise UnreachableRefused(
                f"{self.actuator_id}: value must be a finite number, got {value}", actuator=self.actuator_id
            )
        low, high = self.reachable()
        wanted = value
        if self.kind == "phase":
            wanted = value % TWO_PI
            while wanted < low - 1e-12:
                wanted += TWO_PI
        if not low - 1e-12 <= wanted <= high + 1e-12:
            unit = "rad" if self.kind == "phase" else "(power coupling)"
            raise UnreachableRefused(
                f"{self.actuator_id}: {value:.6g} {unit} is not reachable; within its {self.hard_limit_volts:g} V "
                f"limit it reaches {low:.6g} to {high:.6g}",
                actuator=self.actuator_id,
                value=value,
                reachable=[low, high],
            )
        wanted = min(max(wanted, low), high)
        if wanted <= low:
            return 0.0
        if wanted >= high:
            return self.top_volts
        return min(self._solve(wanted), self.top_volts)


def build_maps(
    tables: dict[str, CalibrationTable], kinds: dict[str, str], limits: dict[str, float]
) -> dict[str, ActuatorMap]:
    """One :class:`ActuatorMap` per actuator."""
    return {aid: ActuatorMap(aid, kinds[aid], tables[aid], limits[aid]) for aid in tables}
