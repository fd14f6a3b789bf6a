"""Electrostatic actuators: parallel plates (couplers) and comb drives (phase shifters).

Parallel plate, spring k, area A, air gap g0, dielectric layer of thickness t_d and relative
permittivity eps_r on the fixed electrode (electrically an air gap of d = t_d / eps_r):

* force F = eps0 A V^2 / (2 (g0 + d - x)^2)
  (Senturia, *Microsystem Design*, Kluwer 2001, ch. 6);
* static pull-in at x = (g0 + d) / 3, V_PI = sqrt(8 k (g0 + d)^3 / (27 eps0 A))
  (Nathanson et al., IEEE Trans. Electron Devices 14:117, 1967);
* stable equilibrium: with u = x / (g0 + d), u (1 - u)^2 = (4/27) (V / V_PI)^2, smallest root;
* after contact the plate rests on the dielectric and is released only below the pull-out
  voltage V_PO = sqrt(2 k g0 d^2 / (eps0 A)) (Rebeiz, *RF MEMS*, Wiley 2003; formula from
  memory), so an up/down sweep traces a hysteresis loop.

Comb drive with n fingers (2n gaps of width g), structure thickness t: F = n eps0 t V^2 / g,
independent of the engagement x, so x = F / k grows as V^2 (Tang, Nguyen, Howe, Sens. Actuators
20:25, 1989). The comb snaps sideways above a lateral instability voltage; the simulator takes
that voltage as a device parameter.

Dielectric charging shifts the effective voltage: V_shift = sigma t_d / (eps0 eps_r) (Wibbeler
et al., Sens. Actuators A 71:74, 1998; from memory).

All functions are vectorised over numpy arrays.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.constants import epsilon_0

FloatArray = NDArray[np.float64]


def parallel_plate_force(volts: ArrayLike, area_m2: ArrayLike, gap_m: ArrayLike, x_m: ArrayLike = 0.0) -> FloatArray:
    """Attractive force in N between plates at electrical gap ``gap_m`` displaced by ``x_m``."""
    v = np.asarray(volts, dtype=float)
    return np.asarray(epsilon_0 * np.asarray(area_m2) * v**2 / (2.0 * (np.asarray(gap_m) - np.asarray(x_m)) ** 2))


def pull_in_volts(k_n_per_m: ArrayLike, gap_m: ArrayLike, area_m2: ArrayLike) -> FloatArray:
    """Static pull-in voltage of a parallel-plate actuator with electrical gap ``gap_m``."""
    k, g, a = (np.asarray(v, dtype=float) for v in (k_n_per_m, gap_m, area_m2))
    return np.asarray(np.sqrt(8.0 * k * g**3 / (27.0 * epsilon_0 * a)))


def pull_out_volts(
    k_n_per_m: ArrayLike, air_gap_m: ArrayLike, dielectric_gap_m: ArrayLike, area_m2: ArrayLike
) -> FloatArray:
    """Voltage below which a plate in contact with the dielectric springs back."""
    k, g0, d, a = (np.asarray(v, dtype=float) for v in (k_n_per_m, air_gap_m, dielectric_gap_m, area_m2))
    return np.asarray(np.sqrt(2.0 * k * g0 * d**2 / (epsilon_0 * a)))


def equilibrium_fraction(volts_ratio: ArrayLike) -> FloatArray:
    """Stable equilibrium u = x / gap for V / V_PI; NaN where there is none (|V| > V_PI).

    Closed form: the cubic u^3 - 2u^2 + u - a = 0, a = (4/27) r^2, has three real roots for
    a <= 4/27; its smallest, by the trigonometric method, is
    u = 2/3 + (2/3) cos(arccos((27a - 2) / 2) / 3 - 4 pi / 3).
    """
    r = np.abs(np.asarray(volts_ratio, dtype=float))
    a = (4.0 / 27.0) * r**2
    arg = (27.0 * a - 2.0) / 2.0
    with np.errstate(invalid="ignore"):
        u = 2.0 / 3.0 + (2.0 / 3.0) * np.cos(np.arccos(np.clip(arg, -1.0, 1.0)) / 3.0 - 4.0 * np.pi / 3.0)
    return np.asarray(np.where(r <= 1.0, u, np.nan))


def comb_force(volts: ArrayLike, fingers: ArrayLike, thickness_m: ArrayLike, finger_gap_m: ArrayLike) -> FloatArray:
    """Comb-drive force in N: n eps0 t V^2 / g, independent of engagement."""
    v = np.asarray(volts, dtype=float)
    return np.asarray(np.asarray(fingers) * epsilon_0 * np.asarray(thickness_m) * v**2 / np.asarray(finger_gap_m))


def charging_shift_volts(charge_c_per_m2: ArrayLike, dielectric_m: ArrayLike, eps_r: ArrayLike) -> FloatArray:
    """Voltage offset produced by trapped charge density sigma in a dielectric layer."""
    return np.asarray(np.asarray(charge_c_per_m2) * np.asarray(dielectric_m) / (epsilon_0 * np.asarray(eps_r)))
