"""Crosstalk between neighbouring electrostatic actuators, and the drive that cancels it.

An electrostatic actuator is pulled by every electrode near it: the force of an electrode at
voltage V on a grounded moving part is (1/2) (dC/dx) V^2, whatever the polarity (Senturia,
*Microsystem Design*, Kluwer 2001, ch. 6). A neighbour's fringing field therefore adds a small
share of its own V^2: the actuator moves as if driven by

    V_eq^2 = V^2 + sum_j s_j V_j^2

and its calibration table, measured with the neighbours at 0 V, maps V_eq to its logical value.
The shares are measured by the calibration (a neighbour driven high shifts the actuator's
reading by a known V_eq; :func:`share_from_shift`) and stored with its version.

Cancelling: for the actuators of one request, the wanted V_eq^2 (from their tables) and the
squared volts of everything else are known, so the squared drives solve a linear system,
(I + S_rr) x = u - S_ro y (the usual linear crosstalk-matrix inversion, as done for thermal
phase shifters: M. Milanizadeh et al., J. Lightwave Technol. 37:1325, 2019 - from memory). An
actuator that its neighbours alone push past its target gets 0 V: nothing better exists, and its
value is then off by the excess (the reply's values say what was asked, the report what each
share was).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from meshwarden.errors import CalibrationError

MAX_SHARE = 0.5  # a neighbour acting with half an actuator's own force is not crosstalk but a wiring fault
# All neighbours together below the actuator's own drive: then I + S is strictly diagonally dominant
# by rows, and so is every principal part of it, so every joint solve has one solution (the
# Levy-Desplanques theorem; Horn & Johnson, Matrix Analysis, 2nd ed., Thm 6.1.10 - from memory).
MAX_TOTAL_SHARE = 1.0


def share_from_shift(own_volts: float, equivalent_volts: float, neighbour_volts: float) -> float:
    """The share s of a neighbour at ``neighbour_volts`` that moved an actuator held at
    ``own_volts`` to where its table puts ``equivalent_volts``: (V_eq^2 - V^2) / V_j^2."""
    if not neighbour_volts > 0.0:
        raise ValueError("the neighbour must be driven (volts > 0) to measure its share")
    return (equivalent_volts**2 - own_volts**2) / neighbour_volts**2


@dataclass(frozen=True)
class CrosstalkShares:
    """Measured shares: ``shares[on][by]`` of actuator ``by``'s V^2 acting on ``on``."""

    shares: Mapping[str, Mapping[str, float]] = field(default_factory=dict)

    @classmethod
    def from_data(cls, data: Any, actuators: set[str], where: str) -> CrosstalkShares:
        """Shares as stored in a calibration version's manifest, checked against the chip."""
        if data is None:
            return cls({})
        if not isinstance(data, dict):
            raise CalibrationError(f"{where}: crosstalk must be a mapping of actuator -> {{neighbour: share}}")
        out: dict[str, dict[str, float]] = {}
        for on, row in data.items():
            if on not in actuators or not isinstance(row, dict):
                raise CalibrationError(f"{where}: crosstalk on '{on}': not an actuator of this chip, or not a mapping")
            for by, share in row.items():
                if by not in actuators or by == on:
                    raise CalibrationError(f"{where}: crosstalk on '{on}' by '{by}': not another actuator of this chip")
                if isinstance(share, bool) or not isinstance(share, int | float) or not math.isfinite(share):
                    raise CalibrationError(f"{where}: crosstalk on '{on}' by '{by}': {share!r} is not a number")
                if not 0.0 <= float(share) <= MAX_SHARE:
                    raise CalibrationError(
                        f"{where}: crosstalk on '{on}' by '{by}': {share} is outside 0 to {MAX_SHARE}"
                    )
                out.setdefault(str(on), {})[str(by)] = float(share)
            total = sum(out.get(str(on), {}).values())
            if total >= MAX_TOTAL_SHARE:
                raise CalibrationError(
                    f"{where}: crosstalk on '{on}': its neighbours' shares add up to {total:.6g}, "
                    f"not below {MAX_TOTAL_SHARE} (they would move it as much as its own drive)"
                )
        return cls(out)

    def as_data(self) -> dict[str, dict[str, float]]:
        return {on: dict(row) for on, row in sorted(self.shares.items())}

    def merged(self, newer: CrosstalkShares) -> CrosstalkShares:
        """These shares with ``newer``'s measurements in their place."""
        out = {on: dict(row) for on, row in self.shares.items()}
        for on, row in newer.shares.items():
            out.setdefault(on, {}).update(row)
        return CrosstalkShares(out)

    def __bool__(self) -> bool:
        return any(self.shares.values())

    def equivalent_volts(self, name: str, volts: Mapping[str, float]) -> float:
        """V_eq of ``name`` with every actuator at ``volts`` (absent ones at 0 V)."""
        squared = volts.get(name, 0.0) ** 2 + sum(
            share * volts.get(by, 0.0) ** 2 for by, share in self.shares.get(name, {}).items()
        )
        return math.sqrt(squared)

    def acting_on(self, moved: frozenset[str]) -> set[str]:
        """The actuators on which one of ``moved`` acts."""
        return {on for on, row in self.shares.items() if moved.intersection(row)}

    def drive_volts(self, equivalent: Mapping[str, float], held: Mapping[str, float]) -> dict[str, float]:
        """Volts for the actuators of ``equivalent`` (each wants that V_eq) with every other
        actuator at its ``held`` volts: the solution of (I + S_rr) x = u - S_ro y, x = V^2 >= 0
        (an actuator whose solution is below 0 gets 0 V and the rest are solved again)."""
        free = [n for n in equivalent if n in self.shares or any(n in row for row in self.shares.values())]
        out = {n: float(v) for n, v in equivalent.items()}
        fixed = {n: float(v) for n, v in held.items() if n not in equivalent}
        fixed.update({n: float(v) for n, v in equivalent.items() if n not in free})
        while free:
            index = {n: i for i, n in enumerate(free)}
            matrix = np.eye(len(free))
            rhs = np.array([equivalent[n] ** 2 for n in free])
            for on in free:
                for by, share in self.shares.get(on, {}).items():
                    if by in index:
                        matrix[index[on], index[by]] += share
                    else:
                        rhs[index[on]] -= share * fixed.get(by, 0.0) ** 2
            try:
                squared = np.linalg.solve(matrix, rhs)
            except np.linalg.LinAlgError:
                raise CalibrationError(
                    f"the crosstalk shares among {', '.join(free)} cannot be solved for (their matrix is singular)"
                ) from None
            negative = [n for n, x in zip(free, squared, strict=True) if x < 0.0]
            if not negative:
                out.update({n: math.sqrt(float(x)) for n, x in zip(free, squared, strict=True)})
                break
            for n in negative:
                out[n] = fixed[n] = 0.0
            free = [n for n in free if n not in negative]
        return out
