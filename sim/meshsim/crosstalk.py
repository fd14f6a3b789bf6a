"""Electrostatic crosstalk between neighbouring actuators.

An electrostatic actuator is pulled by every electrode near it, not only its own: the force of
an electrode at voltage V on a grounded moving part is (1/2) (dC/dx) V^2, attractive whatever
the polarity (Senturia, *Microsystem Design*, Kluwer 2001, ch. 6). A neighbour's fringing field
therefore acts like a small extra share of drive: the actuator moves as if driven by
V_eq^2 = V^2 + sum_j f_j V_j^2, always in the direction of its own drive (positive for both
kinds here). The shares f_j are a stand-in for a fringing-field simulation of a real layout:
``within_gate_fraction`` between a gate's coupler and phase shifter, ``adjacent_gate_fraction``
between like actuators of gates side by side in one lattice column.

Quasi-static: the neighbour's share moves the equilibrium but excites no ringing of its own.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from meshsim.params import Crosstalk

F = NDArray[np.float64]
I = NDArray[np.int64]  # noqa: E741


def neighbour_matrix(
    actuators: int,
    gate_coupler: I,
    gate_phase: I,
    gate_position: dict[int, tuple[int, int]],
    crosstalk: Crosstalk,
) -> F:
    """Shares f[i, j] of actuator j's V^2 acting on actuator i (zero diagonal).

    ``gate_position`` maps a gate index to its (column, top mode) in the lattice; gates not in it
    have neighbours only within themselves.
    """
    shares = np.zeros((actuators, actuators))
    within = crosstalk.within_gate_fraction
    shares[gate_coupler, gate_phase] = within
    shares[gate_phase, gate_coupler] = within
    adjacent = crosstalk.adjacent_gate_fraction
    by_place = {place: g for g, place in gate_position.items()}
    for g, (column, top) in gate_position.items():
        h = by_place.get((column, top + 2))
        if h is None:
            continue
        for own, other in ((gate_coupler[g], gate_coupler[h]), (gate_phase[g], gate_phase[h])):
            shares[own, other] = adjacent
            shares[other, own] = adjacent
    np.fill_diagonal(shares, 0.0)
    return shares


def equivalent_squared_volts(shares: F, volts: F) -> F:
    """V_eq^2 = V^2 + sum_j f[i, j] V_j^2 for every actuator."""
    squared = volts * volts
    return np.asarray(squared + shares @ squared)
