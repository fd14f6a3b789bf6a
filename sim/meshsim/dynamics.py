"""Second-order motion of the actuators: m x'' + b x' + k x = F(V, x).

Three pieces, chosen so that the simulation is both honest where it matters and cheap:

* :func:`first_peak` is the reference: it integrates the full nonlinear equation (classical
  fourth-order Runge-Kutta, vectorised over actuators) from the moment of a voltage step until
  the first maximum of the displacement, or until contact. This is where a step can snap a
  parallel-plate actuator below its static pull-in voltage (dynamic pull-in; for an undamped
  step the threshold is sqrt(27/32) V_PI, reached at x = g/2 - see docs/simulator.md).
* :class:`PlateSteps` decides the same question without integrating wherever the answer is
  certain: a plate whose energy after the step lies below the top of its potential well cannot
  reach contact, whatever the damping. Only steps close to that border (and above static
  pull-in) go to the reference. It also gives the first peak from the linear response where the
  swing is small, to compare with the reference.
* :class:`Ringing` carries the transient afterwards with the exact solution of the damped
  oscillator linearised about the new equilibrium (stiffness softened by dF/dx), so that a state
  can be evaluated at any later time in O(1) and consecutive steps superpose while the ringing
  has not decayed: the state at the moment of the next step is the starting point of its
  response. With damping the first peak after a step is the largest, which is why one nonlinear
  window per step decides whether the actuator snaps.

Resonance and damping: f0 = sqrt(k/m) / (2 pi), Q = sqrt(k m) / b = 1 / (2 zeta).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray
from scipy.constants import epsilon_0

from meshsim.devices import plate_roots

F = NDArray[np.float64]
B = NDArray[np.bool_]
C = NDArray[np.complex128]
ForceFn = Callable[[F, F], F]

# A transient counts as over after this many time constants of its slower decay (e^-50 = 2e-22).
QUIET_E_FOLDINGS = 50.0


def first_peak(
    x0: F,
    v0: F,
    volts: F,
    mass: F,
    damping: F,
    spring: F,
    force: ForceFn,
    contact: F,
    *,
    steps_per_period: int = 64,
    max_periods: float = 200.0,
) -> tuple[F, B]:
    """Largest displacement until the first maximum after a step to ``volts``, and whether contact
    (x >= ``contact``) was reached. ``force(volts, x)`` returns the electrostatic force."""
    x = np.array(x0, dtype=float)
    v = np.array(v0, dtype=float)
    peak = x.copy()
    # A plate that starts at the contact (just released) has hit nothing unless it moves into it.
    hit = np.zeros(x.shape, dtype=bool)
    done = hit.copy()
    w0 = np.sqrt(spring / mass)
    dt = float(np.min(2.0 * np.pi / w0)) / steps_per_period
    steps = int(max_periods * steps_per_period * float(np.max(w0) / np.min(w0)))

    def accel(xx: F, vv: F) -> F:
        return (force(volts, xx) - damping * vv - spring * xx) / mass

    moving_up = v > 0
    fastest = np.abs(v)
    for _ in range(steps):
        active = ~done
        if not active.any():
            break
        k1x, k1v = v, accel(x, v)
        k2x, k2v = v + 0.5 * dt * k1v, accel(x + 0.5 * dt * k1x, v + 0.5 * dt * k1v)
        k3x, k3v = v + 0.5 * dt * k2v, accel(x + 0.5 * dt * k2x, v + 0.5 * dt * k2v)
        k4x, k4v = v + dt * k3v, accel(x + dt * k3x, v + dt * k3v)
        x = np.where(active, x + dt / 6.0 * (k1x + 2 * k2x + 2 * k3x + k4x), x)
        v_new = np.where(active, v + dt / 6.0 * (k1v + 2 * k2v + 2 * k3v + k4v), v)
        peak = np.where(active, np.maximum(peak, x), peak)
        reached = active & (x >= contact) & (v_new >= 0.0)
        hit |= reached
        turned = active & moving_up & (v_new <= 0.0)
        fastest = np.maximum(fastest, np.abs(v_new))
        # Overdamped motion never turns back: it has stopped once its speed has all but died away.
        # A trough of an oscillation is no stop (there the speed is small but the acceleration is
        # not): the plate is about to move up again toward the maximum this window looks for.
        stopped = active & (np.abs(v_new) <= 1e-3 * fastest) & (np.abs(k4v) * dt <= 1e-3 * fastest)
        done |= reached | turned | stopped
        moving_up |= v_new > 0
        v = v_new
    return peak, hit


class Ringing:
    """The decaying oscillation of each actuator about its equilibrium, evaluated exactly at any time.

    Underdamped, this is y(t) = e^{-zeta w t} (y0 cos(w_d t) + (v0 + zeta w y0) / w_d sin(w_d t)),
    w_d = w sqrt(1 - zeta^2). It is written as y = c1 e^{s1 t} + c2 e^{s2 t} with the characteristic
    roots s = -zeta w +- w sqrt(zeta^2 - 1) (complex when underdamped): no term can overflow, since
    both roots have non-positive real parts, and the overdamped case needs no special branch. The
    roots and coefficients are worked out once per transient (:meth:`restart`), so that reading
    the state - which every monitor read does for every actuator - costs two exponentials.
    """

    def __init__(self, n: int) -> None:
        self.t0 = np.zeros(n)
        self.quiet_from = np.zeros(n)
        zero, one = np.zeros(n), np.ones(n)
        self._roots, self._coefficients = _modes(zero, zero, one, one)

    def restart(self, index: NDArray[np.int64], t: float, y0: F, v0: F, w: F, zeta: F) -> None:
        """Begin a new transient for ``index`` at time ``t`` with deviation ``y0`` and velocity ``v0``."""
        self.t0[index] = t
        roots, self._coefficients[:, index] = _modes(y0, v0, w, zeta)
        self._roots[:, index] = roots
        # s1 is the slower root (the same real part as s2 when underdamped); see state.
        self.quiet_from[index] = t - QUIET_E_FOLDINGS / roots[0].real

    def stop(self, index: NDArray[np.int64], t: float) -> None:
        """No transient for ``index`` from time ``t`` on (an actuator coming to rest at its equilibrium)."""
        self.t0[index] = t
        self._coefficients[:, index] = 0.0
        self.quiet_from[index] = t

    def state(self, t: float, index: NDArray[np.int64] | slice = slice(None)) -> tuple[F, F]:
        """Deviation from equilibrium and velocity at time ``t``; exactly zero once the slower of
        the two decays has run ``QUIET_E_FOLDINGS`` time constants, which spares the arithmetic for
        the usual case of a write long after the last one settled."""
        quiet = t >= self.quiet_from[index]
        if quiet.all():
            zero = np.zeros(quiet.shape)
            return zero, zero
        tau = np.maximum(t - self.t0[index], 0.0)
        s = self._roots[:, index]
        a = self._coefficients[:, index] * np.exp(s * tau)
        a1, a2 = a
        s1, s2 = s
        return np.where(quiet, 0.0, (a1 + a2).real), np.where(quiet, 0.0, (a1 * s1 + a2 * s2).real)


_PLUS_MINUS = np.array([[1.0], [-1.0]])


def _modes(y0: F, v0: F, w: F, zeta: F) -> tuple[C, C]:
    """Roots (s1, s2) and coefficients (c1, c2) of y = c1 e^{s1 t} + c2 e^{s2 t}, as two rows each:
    s = -zeta w +- r, r = w sqrt(zeta^2 - 1); c1 = (v0 - s2 y0) / (2 r), c2 = -(v0 - s1 y0) / (2 r)."""
    z = np.where(np.abs(zeta - 1.0) < 1e-7, 1.0 + 1e-7, zeta)  # critically damped: nudge off the double root
    root = w * np.sqrt((z * z - 1.0).astype(complex))
    roots = _PLUS_MINUS * root - z * w
    return roots, _PLUS_MINUS * (v0 - roots[::-1] * y0) / (2.0 * root)


# Energy margin of the fast path: a step is decided without integration only while its energy lies
# below this fraction of the way from the well's bottom to its top (see PlateSteps).
BARRIER_FRACTION = 0.98
# Largest nonlinearity F'' A / k_eff over the swing for which the linear peak is used (see PlateSteps).
LINEAR_LIMIT = 0.05


@dataclass(frozen=True)
class PlateStepOutcome:
    """What a step does to each parallel-plate actuator: whether it snapped, and the linearisation
    about its new equilibrium (NaN equilibrium above static pull-in)."""

    hit: B
    equilibrium_m: F
    w_rad_per_s: F
    zeta: F
    integrated: B  # True where the nonlinear reference integration decided


class _Well(NamedTuple):
    """One step's potential well, in units of the gap where the name ends in _u."""

    x_e: F
    one_e: F
    ratio: F
    kappa: F
    w: F
    zeta: F
    headroom: F
    u0: F
    nu: F


class PlateSteps:
    """Steps of parallel-plate actuators: the snap verdict exactly and fast, the first peak fast
    where the linear response describes it.

    In units of the electrical gap g (u = x / g) and with a = (4/27) (V / V_PI)^2, the spring and
    the plate force F = eps0 A V^2 / (2 (g - x)^2) have the potential U = k g^2 (u^2 / 2 - a / (1 - u)),
    and the energy E = m v^2 / 2 + U only falls under damping. Between the stable equilibrium u_e
    and the contact, U is highest at the unstable equilibrium u_u (the middle root of
    u (1 - u)^2 = a) or at the contact if that comes first: the top. A plate that starts below
    the top with E < U(top) can never pass it, so it never reaches contact. Hence:

    * :meth:`verdict`: a step whose energy lies below ``BARRIER_FRACTION`` of the way from U(u_e)
      to U(top) does not snap - exactly, not by estimate (for an undamped step from rest this
      border is V = sqrt(27/32) V_PI, the published dynamic pull-in); every other step (near or
      over the top, above static pull-in, starting at or past the top) is integrated with
      :func:`first_peak`, the reference;
    * :meth:`first_peak`: as :func:`first_peak`, and where the verdict is certain, the swing is
      small (F''(x_e) A / k_eff <= ``LINEAR_LIMIT``, A = sqrt(y0^2 + (v0 / w)^2) the linear
      amplitude) and the linearisation underdamped, the peak is the first maximum of the exact
      linear response about x_e with the spring softened to k_eff = k - dF/dx. The error of that
      peak is second order in the swing: about LINEAR_LIMIT / 3 of A at most.
    """

    def __init__(self, mass: F, damping: F, spring: F, area: F, gap: F, contact: F) -> None:
        force_scale = epsilon_0 * area / 2.0
        pull_in = np.sqrt(8.0 * spring * gap**3 / (27.0 * epsilon_0 * area))
        w0 = np.sqrt(spring / mass)
        # One row per constant, so that one fancy index gathers them all for a set of actuators.
        self._si = np.array([spring, mass, damping, force_scale, gap, contact])
        zeta0 = damping / (2.0 * np.sqrt(spring * mass))
        self._unit = np.array([gap, 1.0 / gap, (4.0 / 27.0) / pull_in**2, w0, 1.0 / (w0 * gap), zeta0, contact / gap])

    def verdict(self, index: NDArray[np.int64], x0: F, v0: F, volts: F) -> PlateStepOutcome:
        """The step to ``volts`` of actuators ``index`` that start at displacement ``x0``, speed ``v0``."""
        well = self._well(index, x0, v0, volts)
        certain = well.headroom > 1.0 - BARRIER_FRACTION  # NaN (above pull-in) fails too
        hit = np.zeros(len(index), dtype=bool)
        if not certain.all():
            slow = ~certain
            hit[slow] = self._integrate(index[slow], x0[slow], v0[slow], volts[slow])[1]
        return PlateStepOutcome(hit, well.x_e, well.w, well.zeta, ~certain)

    def first_peak(self, index: NDArray[np.int64], x0: F, v0: F, volts: F) -> tuple[F, B]:
        """What :func:`first_peak` returns - the largest displacement until the first maximum, and
        whether contact was reached - from the linear response where that holds."""
        well = self._well(index, x0, v0, volts)
        dy = well.u0 - (1.0 - well.one_e)
        swing_u = np.sqrt(dy * dy + well.nu * well.nu / well.kappa)  # linear amplitude A / g
        # F'' A / k_eff = 6 k a / (g (1 - u_e)^4) A / (k kappa) = 6 ratio (A / g) / ((1 - u_e) kappa)
        nonlinearity = 6.0 * well.ratio * swing_u / (well.one_e * well.kappa)
        linear = (well.headroom > 1.0 - BARRIER_FRACTION) & (nonlinearity <= LINEAR_LIMIT) & (well.zeta < 1.0)
        peak = np.array(x0, dtype=float)
        hit = np.zeros(len(index), dtype=bool)
        if linear.any():
            f = linear
            y0 = x0[f] - well.x_e[f]
            peak[f] = np.maximum(x0[f], well.x_e[f] + _first_maximum(y0, v0[f], well.w[f], well.zeta[f]))
        rest = ~linear
        if rest.any():
            peak[rest], hit[rest] = self._integrate(index[rest], x0[rest], v0[rest], volts[rest])
        return peak, hit

    def headroom(self, index: NDArray[np.int64], x0: F, v0: F, volts: F) -> F:
        """(U(top) - E) / (U(top) - U(u_e)) of each step: 1 at rest at the equilibrium, 0 with
        just the energy to reach the top; negative or NaN where contact is not excluded."""
        return self._well(index, x0, v0, volts).headroom

    def _well(self, index: NDArray[np.int64], x0: F, v0: F, volts: F) -> _Well:
        g, inv_g, a_per_v2, w0, inv_w0g, zeta0, contact_u = self._unit[:, index]
        a = volts * volts * a_per_v2
        u_e, u_u = plate_roots(a)
        one_e = 1.0 - u_e
        ratio = a / one_e**3  # dF/dx / (2 k) at the equilibrium
        kappa = np.maximum(1.0 - 2.0 * ratio, 1e-6)  # k_eff / k, floored as the ringing needs w > 0
        root_kappa = np.sqrt(kappa)
        u0 = x0 * inv_g
        nu = v0 * inv_w0g  # speed in units of w0 g: kinetic energy m v^2 / 2 = k g^2 nu^2 / 2
        top = np.minimum(u_u, contact_u)
        # U / (k g^2) = u^2 / 2 - a / (1 - u); at the equilibrium a / (1 - u_e) = u_e (1 - u_e).
        bottom = u_e * (0.5 * u_e - one_e)
        height = 0.5 * top * top - a / (1.0 - top)
        start = np.minimum(u0, top)
        energy = 0.5 * (start * start + nu * nu) - a / (1.0 - start)
        headroom = np.where(u0 < top, (height - energy) / (height - bottom), -np.inf)
        return _Well(g * u_e, one_e, ratio, kappa, w0 * root_kappa, zeta0 / root_kappa, headroom, u0, nu)

    def _integrate(self, index: NDArray[np.int64], x0: F, v0: F, volts: F) -> tuple[F, B]:
        k, m, b, c, g, contact = self._si[:, index]

        def force(v: F, x: F) -> F:
            return np.asarray(c * v * v / ((g - x) * (g - x)))

        return first_peak(x0, v0, volts, m, b, k, force, contact)


def _first_maximum(y0: F, v0: F, w: F, zeta: F) -> F:
    """Deviation at the first maximum after t = 0 of y'' + 2 zeta w y' + w^2 y = 0 (zeta < 1).

    The velocity is e^{-sigma t} (v0 cos(w_d t) + s sin(w_d t)), s = -(w^2 y0 + sigma v0) / w_d,
    sigma = zeta w, i.e. e^{-sigma t} R cos(w_d t - alpha) with alpha = atan2(s, v0); it turns
    from rising to falling where w_d t - alpha = pi/2 (mod 2 pi), the first time t >= 0.
    """
    sigma = zeta * w
    wd = w * np.sqrt(1.0 - zeta * zeta)
    alpha = np.arctan2(-(w * w * y0 + sigma * v0) / wd, v0)
    t1 = np.mod(0.5 * np.pi + alpha, 2.0 * np.pi) / wd
    phase = wd * t1
    return np.asarray(np.exp(-sigma * t1) * (y0 * np.cos(phase) + (v0 + sigma * y0) / wd * np.sin(phase)))
