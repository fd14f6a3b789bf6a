"""Second-order motion of the actuators: m x'' + b x' + k x = F(V, x).

Two pieces, chosen so that the simulation is both honest where it matters and cheap:

* :func:`first_peak` integrates the full nonlinear equation (classical fourth-order Runge-Kutta,
  vectorised over actuators) from the moment of a voltage step until the first maximum of the
  displacement, or until contact. This is where a step can snap a parallel-plate actuator
  below its static pull-in voltage (dynamic pull-in; for an undamped step the threshold is
  sqrt(27/32) V_PI, reached at x = g/2 - see shared/PHYSICS.md).
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

import numpy as np
from numpy.typing import NDArray

F = NDArray[np.float64]
B = NDArray[np.bool_]
ForceFn = Callable[[F, F], F]


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
        stopped = active & (np.abs(v_new) <= 1e-3 * fastest)
        done |= reached | turned | stopped
        moving_up |= v_new > 0
        v = v_new
    return peak, hit


class Ringing:
    """The decaying oscillation of each actuator about its equilibrium, evaluated exactly at any time.

    Underdamped, this is y(t) = e^{-zeta w t} (y0 cos(w_d t) + (v0 + zeta w y0) / w_d sin(w_d t)),
    w_d = w sqrt(1 - zeta^2).
    """

    def __init__(self, n: int) -> None:
        self.t0 = np.zeros(n)
        self.y0 = np.zeros(n)
        self.v0 = np.zeros(n)
        self.w = np.ones(n)
        self.zeta = np.ones(n)

    def restart(self, index: NDArray[np.int64], t: float, y0: F, v0: F, w: F, zeta: F) -> None:
        """Begin a new transient for ``index`` at time ``t`` with deviation ``y0`` and velocity ``v0``."""
        self.t0[index] = t
        self.y0[index] = y0
        self.v0[index] = v0
        self.w[index] = w
        self.zeta[index] = zeta

    def state(self, t: float, index: NDArray[np.int64] | slice = slice(None)) -> tuple[F, F]:
        """Deviation from equilibrium and velocity at time ``t``.

        Written as y = c1 e^{s1 t} + c2 e^{s2 t} with the characteristic roots
        s = -zeta w +- w sqrt(zeta^2 - 1) (complex when underdamped): no term can overflow, since
        both roots have non-positive real parts, and the overdamped case needs no special branch.
        """
        tau = np.maximum(t - self.t0[index], 0.0)
        w, z, y0, v0 = self.w[index], self.zeta[index], self.y0[index], self.v0[index]
        z = np.where(np.abs(z - 1.0) < 1e-7, 1.0 + 1e-7, z)  # critically damped: nudge off the double root
        root = w * np.sqrt((z * z - 1.0).astype(complex))
        s1, s2 = -z * w + root, -z * w - root
        c1 = (v0 - s2 * y0) / (s1 - s2)
        c2 = (s1 * y0 - v0) / (s1 - s2)
        slowest = np.maximum(s1.real, s2.real)
        settled = slowest * tau < -50.0
        tau = np.where(settled, 0.0, tau)
        e1, e2 = np.exp(s1 * tau), np.exp(s2 * tau)
        y = np.where(settled, 0.0, (c1 * e1 + c2 * e2).real)
        dy = np.where(settled, 0.0, (c1 * s1 * e1 + c2 * s2 * e2).real)
        return np.asarray(y, dtype=float), np.asarray(dy, dtype=float)
