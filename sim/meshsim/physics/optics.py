"""Guided-wave optics at one wavelength: couplers, phase, and a lattice of gates.

* Directional coupler: power coupling kappa = sin^2(C L) for coupling coefficient C over length
  L (Yariv, IEEE JQE 9:919, 1973; Haus & Huang, Proc. IEEE 79:1505, 1991).
* C falls exponentially with the waveguide gap, C(g) = C_ref exp(-(g - g_ref) / l_decay), the
  evanescent tail decaying with 1 / l_decay ~ k0 sqrt(n_eff^2 - n_clad^2) (Chrostowski &
  Hochberg, *Silicon Photonics Design*, CUP 2015; from memory).
* 2x2 coupler transfer matrix [[sqrt(1-k), i sqrt(k)], [i sqrt(k), sqrt(1-k)]]: unitary, the
  "bar" port is the same waveguide (port 0 -> 0), the "cross" port picks up +pi/2.
* Splitting angle: the coupler matrix is [[cos t, i sin t], [i sin t, cos t]] with t = C L, so a
  fabrication error of the angle adds to C L: kappa = sin^2(C L + delta) (the beam-splitter error
  model of Miller, Optica 2:747, 2015; from memory).
* Phase shifter: a dielectric beam moved toward the waveguide raises its effective index,
  dn(g) = dn_contact exp(-g / l_decay); phase = 2 pi dn L / lambda, positive phase = delay, the
  field multiplied by exp(+i phi) (our convention).
* Insertion loss in dB of a power ratio: L = -10 log10(P_out / P_in); a field amplitude falls by
  10^(-L / 20). The phase arm's loss grows with the actuated phase (the nearer beam scatters
  more of the mode): L = L_0 + s phi, a linear stand-in.

A gate is a tunable coupler on modes (m, m+1) followed by a phase shifter on mode m. The lattice
propagates a field vector through columns of gates with vectorised numpy indexing; taps take a
fixed power fraction to the monitors.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
ComplexArray = NDArray[np.complex128]


def coupling_from_gap(gap_m: ArrayLike, c_ref_per_m: float, gap_ref_m: float, decay_m: float) -> FloatArray:
    """Coupling coefficient C in 1/m at waveguide gap ``gap_m``."""
    return np.asarray(c_ref_per_m * np.exp(-(np.asarray(gap_m, dtype=float) - gap_ref_m) / decay_m))


def kappa_from_coupling(c_per_m: ArrayLike, length_m: ArrayLike) -> FloatArray:
    """Power coupling ratio sin^2(C L)."""
    return np.asarray(np.sin(np.asarray(c_per_m) * np.asarray(length_m)) ** 2)


def kappa_from_angle(angle_rad: ArrayLike) -> FloatArray:
    """Power coupling ratio sin^2 of the splitting angle (C L plus any fabrication error)."""
    return np.asarray(np.sin(np.asarray(angle_rad, dtype=float)) ** 2)


def coupler_matrix(kappa: float) -> ComplexArray:
    """The unitary 2x2 transfer matrix of a lossless coupler with power coupling ``kappa``."""
    t = np.sqrt(1.0 - kappa)
    c = 1j * np.sqrt(kappa)
    return np.array([[t, c], [c, t]], dtype=complex)


def index_shift(gap_m: ArrayLike, dn_contact: ArrayLike, decay_m: ArrayLike) -> FloatArray:
    """Effective-index rise caused by a dielectric beam at ``gap_m`` from the waveguide."""
    return np.asarray(np.asarray(dn_contact) * np.exp(-np.asarray(gap_m, dtype=float) / np.asarray(decay_m)))


def phase_from_index(dn: ArrayLike, length_m: ArrayLike, wavelength_m: float) -> FloatArray:
    """Optical phase 2 pi dn L / lambda in radians."""
    return np.asarray(2.0 * np.pi * np.asarray(dn) * np.asarray(length_m) / wavelength_m)


def arm_loss_db(actuated_phase_rad: ArrayLike, loss_db_per_rad: float) -> FloatArray:
    """Extra insertion loss in dB of a phase arm driven to ``actuated_phase_rad`` (never negative)."""
    return np.asarray(loss_db_per_rad * np.maximum(np.asarray(actuated_phase_rad, dtype=float), 0.0))


def db_to_amplitude(loss_db: ArrayLike) -> FloatArray:
    """Field amplitude factor of a power loss in dB."""
    return np.asarray(10.0 ** (-np.asarray(loss_db, dtype=float) / 20.0))


@dataclass(frozen=True)
class LatticeLayout:
    """Where the gates and taps sit.

    ``columns[c]`` lists (gate index, top mode) pairs of column c; ``taps`` lists
    (after column, mode) for each monitor, in monitor order; a tap after column -1 looks at the
    input. Taps after the last column are the chip's output detectors.
    """

    modes: int
    columns: tuple[tuple[tuple[int, int], ...], ...]
    taps: tuple[tuple[int, int], ...]
    tap_fraction: float


class Lattice:
    """Coherent propagation through a lattice of gates, vectorised per column."""

    def __init__(self, layout: LatticeLayout) -> None:
        self.layout = layout
        self._cols = [
            (np.array([g for g, _ in col], dtype=int), np.array([m for _, m in col], dtype=int))
            for col in layout.columns
        ]
        self._taps_by_column: dict[int, tuple[NDArray[np.int64], NDArray[np.int64]]] = {}
        for after in sorted({c for c, _ in layout.taps}):
            monitors = [i for i, (c, _) in enumerate(layout.taps) if c == after]
            self._taps_by_column[after] = (
                np.array(monitors, dtype=int),
                np.array([layout.taps[i][1] for i in monitors], dtype=int),
            )
        self._tap_through = np.sqrt(1.0 - layout.tap_fraction)
        self._tap_drop = np.sqrt(layout.tap_fraction)

    def propagate(
        self,
        field_in: ComplexArray,
        kappa: FloatArray,
        phase: FloatArray,
        gate_loss_amplitude: FloatArray,
        arm_amplitude: FloatArray | None = None,
    ) -> tuple[ComplexArray, FloatArray]:
        """Return the output field and the optical power (W if the input is in sqrt(W)) at each tap.

        ``gate_loss_amplitude`` applies to both outputs of a gate; ``arm_amplitude`` (optional)
        only to its phase arm, on top of that.
        """
        field = np.array(field_in, dtype=complex)
        tap_power = np.zeros(len(self.layout.taps))
        self._tap(-1, field, tap_power)
        t_all = np.sqrt(1.0 - kappa)
        c_all = 1j * np.sqrt(kappa)
        rot_all = np.exp(1j * phase) * gate_loss_amplitude
        if arm_amplitude is not None:
            rot_all = rot_all * arm_amplitude
        for index, (gates, top) in enumerate(self._cols):
            a = field[top]
            b = field[top + 1]
            t = t_all[gates]
            c = c_all[gates]
            loss = gate_loss_amplitude[gates]
            field[top] = (t * a + c * b) * rot_all[gates]
            field[top + 1] = (c * a + t * b) * loss
            self._tap(index, field, tap_power)
        return field, tap_power

    def transfer_matrix(
        self,
        kappa: FloatArray,
        phase: FloatArray,
        gate_loss_amplitude: FloatArray,
        arm_amplitude: FloatArray | None = None,
    ) -> ComplexArray:
        """The modes x modes field transfer matrix (column k: the output for light in mode k)."""
        eye = np.eye(self.layout.modes, dtype=complex)
        columns = [self.propagate(eye[k], kappa, phase, gate_loss_amplitude, arm_amplitude)[0] for k in range(len(eye))]
        return np.column_stack(columns)

    def _tap(self, after: int, field: ComplexArray, tap_power: FloatArray) -> None:
        taps = self._taps_by_column.get(after)
        if taps is None or self.layout.tap_fraction <= 0.0:
            return
        monitors, modes = taps
        tap_power[monitors] = np.abs(field[modes] * self._tap_drop) ** 2
        field[modes] *= self._tap_through
