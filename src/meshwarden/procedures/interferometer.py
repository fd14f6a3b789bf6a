"""The ideal lattice, for the one number a phase step cannot measure: its fringe's reference.

A phase shifter is observed as a fringe at a downstream combiner, ``P = A + B cos(phi_t + R)``,
where ``R`` collects everything the interferometer adds to the target's own phase: the other
phases on both paths and the port constants of the couplers on the way (each cross passage
multiplies the field by i, the textbook 2x2 coupler [[sqrt(1-k), i sqrt(k)], [i sqrt(k),
sqrt(1-k)]], Yariv 1973; Haus & Huang 1991). The runner knows the settings and the logical values
of every other phase, so it computes ``R`` from this ideal model - lossless couplers at the
set coupling ratios, phases as set - by four-step phase stepping of the model's own fringe
(Creath 1988): ``R = atan2(I3 - I1, I0 - I2)`` for samples at ``phi_t = k pi/2``.

Conventions (the chip's, docs/procedures.md): a gate at top mode k is a coupler on modes k and
k+1 followed by its phase shifter on mode k, which multiplies the field by exp(+i phi); a tap
``(after, mode)`` sees the power of ``mode`` after column ``after`` (-1: the input).
Pure: no I/O.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from meshwarden.procedures.lattice import LatticeTopology


def tap_powers(
    topology: LatticeTopology,
    kappa: Mapping[str, float],
    phase_rad: Mapping[str, float],
    input_power: Mapping[int, float] | None = None,
) -> dict[str, float]:
    """Power at every tap of the ideal lattice; gates missing from ``kappa`` pass light straight
    (bar), missing phases are 0. ``input_power``: mode -> power (default: 1 in each input mode)."""
    field = np.zeros(topology.modes, dtype=complex)
    for mode, power in (input_power or {m: 1.0 for m in topology.input_modes}).items():
        field[mode] = math.sqrt(power)
    out: dict[str, float] = {}

    def tap(after: int) -> None:
        for monitor, (where, mode) in topology.taps.items():
            if where == after:
                out[monitor] = float(abs(field[mode]) ** 2)

    tap(-1)
    by_column: dict[int, list[tuple[str, int]]] = {}
    for gate, (column, top) in topology.gates.items():
        by_column.setdefault(column, []).append((gate, top))
    for column in range(topology.columns):
        for gate, top in by_column.get(column, []):
            k = min(max(kappa.get(gate, 0.0), 0.0), 1.0)
            t, c = math.sqrt(1.0 - k), 1j * math.sqrt(k)
            a, b = field[top], field[top + 1]
            field[top] = (t * a + c * b) * np.exp(1j * phase_rad.get(gate, 0.0))
            field[top + 1] = c * a + t * b
        tap(column)
    return out


def fringe_reference(
    topology: LatticeTopology,
    target: str,
    fringe_taps: tuple[str, ...],
    kappa: Mapping[str, float],
    phase_rad: Mapping[str, float],
) -> tuple[float, float]:
    """``R`` (rad, in [0, 2 pi)) of the fringe that ``target``'s phase makes at ``fringe_taps``,
    with every other gate as given, and the model's fringe contrast ``B / A`` (0: no fringe)."""
    samples = []
    for k in range(4):
        phases = dict(phase_rad)
        phases[target] = k * math.pi / 2.0
        powers = tap_powers(topology, kappa, phases)
        samples.append(sum(powers[m] for m in fringe_taps))
    i0, i1, i2, i3 = samples
    mean = sum(samples) / 4.0
    contrast = math.hypot(i0 - i2, i3 - i1) / 2.0 / mean if mean > 0 else 0.0
    return math.atan2(i3 - i1, i0 - i2) % (2.0 * math.pi), contrast
