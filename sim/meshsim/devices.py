"""Static curves of the two device kinds: displacement from volts, and optics from displacement.

These are the quasi-static relations (the actuator at rest at its equilibrium); the dynamics on
top of them live in :mod:`meshsim.dynamics`. Each device array holds one entry per actuator so
that fabrication spread is just a different number in the same slot.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
from numpy.typing import NDArray

from meshsim.params import CouplerDevice, PhaseDevice
from meshsim.physics import electrostatics as es
from meshsim.physics import optics

F = NDArray[np.float64]


@dataclass
class PlateArrays:
    """Per-actuator parameters of parallel-plate couplers (SI)."""

    spring: F
    air_gap: F
    dielectric_gap: F  # t_d / eps_r: the dielectric's electrical thickness
    area: F
    mass: F
    damping: F
    optical_gap_rest: F
    device: CouplerDevice

    # Derived constants are computed once: the arrays above are fixed when a chip is made.
    @cached_property
    def electrical_gap(self) -> F:
        return self.air_gap + self.dielectric_gap

    @cached_property
    def pull_in_volts(self) -> F:
        return es.pull_in_volts(self.spring, self.electrical_gap, self.area)

    @cached_property
    def pull_out_volts(self) -> F:
        return es.pull_out_volts(self.spring, self.air_gap, self.dielectric_gap, self.area)

    def equilibrium(self, volts: F, index: NDArray[np.int64] | slice = slice(None)) -> F:
        """Static displacement in m of the actuators ``index`` at ``volts``; NaN above pull-in."""
        return es.equilibrium_fraction(volts / self.pull_in_volts[index]) * self.electrical_gap[index]

    def kappa(self, x: F) -> F:
        d = self.device
        gap = np.maximum(self.optical_gap_rest - x, 0.0)
        c = optics.coupling_from_gap(gap, d.coupling_ref_per_m, d.coupling_ref_gap_m, d.coupling_decay_m)
        return optics.kappa_from_coupling(c, d.coupling_length_m)


@dataclass
class CombArrays:
    """Per-actuator parameters of comb-drive phase shifters (SI)."""

    spring: F
    mass: F
    damping: F
    optical_gap_rest: F
    lateral_snap_volts: F
    device: PhaseDevice

    def force(self, volts: F, x: F | None = None) -> F:
        d = self.device
        return es.comb_force(volts, d.fingers, d.thickness_m, d.finger_gap_m)

    def equilibrium(self, volts: F) -> F:
        return self.force(volts) / self.spring

    @cached_property
    def snap_displacement(self) -> F:
        """Displacement at which the comb snaps sideways (its static snap voltage's equilibrium)."""
        return self.equilibrium(self.lateral_snap_volts)

    def phase(self, x: F, wavelength_m: float) -> F:
        """Phase delay in rad relative to the beam at rest."""
        d = self.device
        gap = np.maximum(self.optical_gap_rest - x, 0.0)
        dn = optics.index_shift(gap, d.index_shift_contact, d.index_decay_m)
        dn0 = optics.index_shift(self.optical_gap_rest, d.index_shift_contact, d.index_decay_m)
        return optics.phase_from_index(dn - dn0, d.length_m, wavelength_m)


# Angles of the smallest and the middle root in the trigonometric solution of the cubic.
_ROOT_SHIFTS = np.array([[4.0 * np.pi / 3.0], [2.0 * np.pi / 3.0]])


def plate_roots(a: F) -> F:
    """The stable and the unstable equilibrium u = x / gap of parallel plates, as two rows: the
    smallest and the middle root of u (1 - u)^2 = a, a = (4/27) (V / V_PI)^2, by the trigonometric
    method (see :func:`meshsim.physics.electrostatics.equilibrium_fraction`, whose stable root
    this is); NaN where there is none (a > 4/27, above pull-in).

    Written with as few array operations as possible: it runs on every write and monitor read.
    """
    third = np.arccos(np.minimum(13.5 * a - 1.0, 1.0)) / 3.0  # (27 a - 2) / 2 = 13.5 a - 1 >= -1
    return np.asarray(np.where(a > 4.0 / 27.0, np.nan, 2.0 / 3.0) + (2.0 / 3.0) * np.cos(third - _ROOT_SHIFTS))


def _mass_damping(spring: F, resonance_hz: float, q: float) -> tuple[F, F]:
    """Mass from f0 = sqrt(k/m) / (2 pi) and damping from Q = sqrt(k m) / b."""
    mass = spring / (2.0 * np.pi * resonance_hz) ** 2
    return mass, np.sqrt(spring * mass) / q


def plate_arrays(
    device: CouplerDevice,
    n: int,
    spring_scale: F | None = None,
    gap_scale: F | None = None,
    optical_scale: F | None = None,
) -> PlateArrays:
    """Couplers with the device's nominal values times the given per-actuator spread factors."""
    one = np.ones(n)
    spring = device.spring_n_per_m * (one if spring_scale is None else spring_scale)
    mass, damping = _mass_damping(spring, device.resonance_hz, device.quality_factor)
    return PlateArrays(
        spring=spring,
        air_gap=device.air_gap_m * (one if gap_scale is None else gap_scale),
        dielectric_gap=one * device.dielectric_m / device.dielectric_eps_r,
        area=one * device.area_m2,
        mass=mass,
        damping=damping,
        optical_gap_rest=device.optical_gap_rest_m * (one if optical_scale is None else optical_scale),
        device=device,
    )


def comb_arrays(
    device: PhaseDevice, n: int, spring_scale: F | None = None, optical_scale: F | None = None
) -> CombArrays:
    """Phase shifters with nominal values times the given per-actuator spread factors."""
    one = np.ones(n)
    spring = device.spring_n_per_m * (one if spring_scale is None else spring_scale)
    mass, damping = _mass_damping(spring, device.resonance_hz, device.quality_factor)
    # The lateral snap voltage scales with sqrt(k) like any electrostatic instability.
    snap = device.lateral_snap_volts * np.sqrt(spring / device.spring_n_per_m)
    return CombArrays(
        spring=spring,
        mass=mass,
        damping=damping,
        optical_gap_rest=device.optical_gap_rest_m * (one if optical_scale is None else optical_scale),
        lateral_snap_volts=snap,
        device=device,
    )
