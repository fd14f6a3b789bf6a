"""The arithmetic of a lock, one window at a time: what it holds, its error, its correction, its
state, and which dither each lock gets.

Extremum holds (max, min). Over a window the dither gives the monitor's slope ``s`` and
curvature ``c`` against the actuator (:func:`meshwarden.procedures.dither.demodulate`). Near a
fringe, ``P = A + B cos(phi - phi_max)`` with ``delta = phi - phi_max``: ``s = -B sin delta`` and
``c = -B cos delta``, so

    delta = atan2(-s, -c)          (holding the maximum; the minimum is delta' = atan2(s, c))

a phase detector from the first and second harmonics together. It needs no fringe amplitude and
no calibration of the power: zero exactly where the first harmonic is zero with the curvature of
the held kind (the extremum-seeking condition, Krstic & Wang, Automatica 36:595, 2000), it is
bounded, and it keeps its sign over the whole fringe, so the loop is pulled to the held extremum
from anywhere but the opposite one. Normalising the gradient by the measured curvature is the
idea of Newton-based extremum seeking (Ghaffari, Krstic & Nesic, Automatica 48:1759, 2012; from
memory); the arctangent keeps it bounded where the curvature passes zero.

Away from the extremum the monitor follows the drift at first order and the small 2f term drowns
in it within a window; once locked, a lock therefore passes the fringe amplitude it learnt at the
extremum and reads the phase from the 1f term alone (:func:`extremum_error`). The window's estimates
come from a least-squares fit with a straight line (:func:`demodulate_detrended`).

If the calibration's phase slope is r times the true one, the fringe in the lock's value units is
``cos(r x)``: ``s = -rB sin(r dx)``, ``c = -r^2 B cos(r dx)`` and atan2 gives ``dx`` near the lock
(first order), whatever r: the loop gain near the lock does not depend on the calibration.

Fraction holds. The window's mean of ``x = P_a / (P_a + P_b)`` less its dither bias
``a^2 c_x / 4`` is the held quantity; the error is that less the target, and its slope is the
dither's measured slope of ``x`` (smoothed over windows by the runner; kept from collapsing near an
extremum of ``x`` by a floor of 0.05 per value unit). The 2f estimate of ``x`` is too noisy on the
slope (``8 / a^2`` times the noise) to normalise by; it only corrects the mean's small bias.

Loop. One correction per window, ``dx = -(K e) / e'`` (:func:`pi_step`, integral form): a
standard first-order discrete loop, error ``(1 - K)^n``, stable for ``0 < K < 2``. ``K`` follows
from the asked bandwidth, ``K = 2 pi f T`` (``T`` the window), and is refused above 1: twice the
nominal 0.5, a factor 2 below the stability bound.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from meshwarden.procedures.dither import Demodulated, dither_cycles
from meshwarden.procedures.inputs import ProcedureInputError, float_vector

NOMINAL_GAIN = 0.5
MAX_GAIN = 1.0
# a correction never moves the centre by more than this (value units: rad for a phase)
MAX_STEP_RAD = 0.3
LOCKED_ERROR = {"extremum": 0.05, "fraction": 0.01}  # |error| below this for LOCK_WINDOWS windows: locked
LOST_ERROR = {"extremum": 1.0, "fraction": 0.1}  # |error| above this once locked: lost
LOCK_WINDOWS = 3
RESIDUAL_WINDOWS = 10  # the residual is the rms error over this many windows
MIN_WINDOW = 8
# x per value unit: an MZI's x = (1 + cos phi) / 2 has slope 0.5 sin(phi), so this floor only acts within
# about 0.1 rad of x's extremum, where the slope says little
MIN_FRACTION_SLOPE = 0.05


@dataclass(frozen=True)
class Hold:
    """What a lock holds: ``max``, ``min`` or ``fraction`` (with its target x)."""

    kind: str
    fraction: float | None = None

    @property
    def extremum(self) -> bool:
        return self.kind in ("max", "min")

    def text(self) -> str:
        return f"fraction={self.fraction:g}" if self.kind == "fraction" else self.kind


def parse_hold(text: str) -> Hold:
    """``max``, ``min`` or ``fraction=X`` with 0 < X < 1."""
    if text in ("max", "min"):
        return Hold(text)
    if isinstance(text, str) and text.startswith("fraction="):
        try:
            value = float(text.split("=", 1)[1])
        except ValueError:
            value = math.nan
        if 0.0 < value < 1.0:
            return Hold("fraction", value)
        raise ProcedureInputError(f"hold: the fraction must be a number between 0 and 1 (exclusive), got {text!r}")
    raise ProcedureInputError(f"hold must be 'max', 'min' or 'fraction=X', got {text!r}")


def extremum_error(slope: float, curvature: float, kind: str, fringe: float = 0.0) -> float:
    """Fringe phase from the held extremum: atan2(-s, -c) for max, atan2(s, c) for min, in (-pi, pi].

    ``fringe`` > 0 (the amplitude hypot(s, c) learnt at the lock, where the curvature is large and
    its estimate good): asin(-s / fringe) for max (asin(s / fringe) for min), in [-pi/2, pi/2].
    Away from the extremum the monitor follows the drift at first order, and within a window that
    noise swamps the small 2f term, even its sign; the 1f term is a times larger and stays good.
    Its sign is the sign of the phase over the whole fringe (s = -B sin delta), so the lock still
    always moves towards the held extremum; beyond pi/2 it reads pi - |delta| and moves slower."""
    if not (math.isfinite(slope) and math.isfinite(curvature) and math.isfinite(fringe)):
        raise ProcedureInputError("slope, curvature and fringe must be finite")
    if kind not in ("max", "min"):
        raise ProcedureInputError(f"extremum_error holds 'max' or 'min', not {kind!r}")
    sign = -1.0 if kind == "max" else 1.0
    if fringe > 0.0:
        return math.asin(max(-1.0, min(1.0, sign * slope / fringe)))
    return math.atan2(sign * slope, sign * curvature)


def demodulate_detrended(samples: Any, cycles: Any, amplitudes: Any) -> Demodulated:
    """Like :func:`~meshwarden.procedures.dither.demodulate`, with a straight line fitted jointly.

    Over a window the drift is close to a ramp, and a ramp is not orthogonal to the dither's bins
    (``sum n sin(2 pi k n / N) = -N / (2 tan(pi k / N))``, ``sum n cos(4 pi k n / N) = -N / 2``): away
    from an extremum, where the monitor moves with the drift at first order, it swamps the small
    2f term (``a^2 f'' / 4``). Least squares on ``[1, n, sin(k), cos(2k) per lock]`` removes it;
    without a ramp the estimates equal the plain projections (the regressors are then orthogonal
    but for ``n``, whose coefficient is zero)."""
    y = float_vector("samples", samples, min_length=8)
    k = float_vector("cycles", cycles)
    a = float_vector("amplitudes", amplitudes)
    if k.shape != a.shape or np.any(a <= 0) or np.any(k < 1) or np.any(2 * k >= y.size / 2):
        raise ProcedureInputError("cycles and amplitudes must match, amplitudes > 0, 1 <= k and 2 k below N/2")
    n = np.arange(y.size, dtype=float)
    phase = 2.0 * math.pi * k[:, None] * n[None, :] / y.size
    design = np.vstack([np.ones_like(n), n - n.mean(), np.sin(phase), np.cos(2.0 * phase)]).T
    coefficients, *_ = np.linalg.lstsq(design, y, rcond=None)
    locks = k.size
    first = coefficients[2 : 2 + locks]  # y ~ ... + (a f') sin(wt) + (-a^2 f'' / 4) cos(2wt)
    second = coefficients[2 + locks :]
    return Demodulated(
        slope=tuple(float(v) for v in first / a),
        curvature=tuple(float(v) for v in -4.0 * second / a**2),
        mean=float(np.mean(y)),
    )


def fraction_samples(power_a: Sequence[float], power_b: Sequence[float]) -> np.ndarray:
    """x = P_a / (P_a + P_b) per sample; a sample with no light at all counts as x = 0.5."""
    a = np.asarray(power_a, dtype=float)
    b = np.asarray(power_b, dtype=float)
    total = a + b
    safe = np.where(total > 0.0, total, 1.0)
    return np.asarray(np.where(total > 0.0, a / safe, 0.5))


def fraction_error(
    mean: float, slope: float, curvature: float, target: float, amplitude: float, min_slope: float = MIN_FRACTION_SLOPE
) -> tuple[float, float]:
    """(error, error slope) of a fraction hold from the window's demodulated x (see module doc); the
    slope is kept at least ``min_slope`` in size, with its sign."""
    held = mean - amplitude**2 * curvature / 4.0  # y = f(x0 + a sin wt): <y> = f(x0) + a^2 f''/4 (Taylor)
    used = slope if abs(slope) >= min_slope else math.copysign(min_slope, slope if slope != 0.0 else 1.0)
    return held - target, used


def gain_for(bandwidth_hz: float | None, window_s: float) -> float:
    """Integral gain per window for ``bandwidth_hz`` (nominal 0.5 when None); refused above 1."""
    if bandwidth_hz is None:
        return NOMINAL_GAIN
    if not (math.isfinite(bandwidth_hz) and bandwidth_hz > 0.0) or not window_s > 0.0:
        raise ProcedureInputError(f"bandwidth must be a positive number of Hz, got {bandwidth_hz}")
    gain = 2.0 * math.pi * bandwidth_hz * window_s
    if gain > MAX_GAIN:
        top = MAX_GAIN / (2.0 * math.pi * window_s)
        raise ProcedureInputError(
            f"bandwidth {bandwidth_hz:g} Hz is above what the dither allows: at most {top:.3g} Hz with a "
            f"{window_s * 1e3:.3g} ms window (loop gain {gain:.3g} > {MAX_GAIN:g} per window)"
        )
    return gain


def bandwidth_of(gain: float, window_s: float) -> float:
    """The loop bandwidth in Hz of an integral gain per window (the inverse of :func:`gain_for`)."""
    return gain / (2.0 * math.pi * window_s)


def next_state(state: str, error: float, recent: Sequence[float], kind: str) -> str:
    """State after a window from ``acquiring``, ``locked`` or ``lost``, given this window's error and
    the errors of the last few windows (this one last)."""
    family = "fraction" if kind == "fraction" else "extremum"
    if state == "locked":
        return "lost" if abs(error) > LOST_ERROR[family] else "locked"
    tail = list(recent)[-LOCK_WINDOWS:]
    if len(tail) == LOCK_WINDOWS and all(abs(e) < LOCKED_ERROR[family] for e in tail):
        return "locked"
    return state


def residual_rms(errors: Sequence[float]) -> float:
    """Root mean square of the errors of the last windows (0 before the first)."""
    values = np.asarray(list(errors)[-RESIDUAL_WINDOWS:], dtype=float)
    return float(np.sqrt(np.mean(values**2))) if values.size else 0.0


def monitor_groups(monitor_sets: Sequence[frozenset[str]]) -> list[int]:
    """Group index per lock: locks are grouped when they share a monitor, directly or through others."""
    parent = list(range(len(monitor_sets)))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    owner: dict[str, int] = {}
    for i, monitors in enumerate(monitor_sets):
        for m in monitors:
            if m in owner:
                parent[root(i)] = root(owner[m])
            else:
                owner[m] = i
    roots: dict[int, int] = {}
    return [roots.setdefault(root(i), len(roots)) for i in range(len(monitor_sets))]


def plan_dithers(monitor_sets: Sequence[frozenset[str]]) -> tuple[int, list[int]]:
    """(window samples, cycles per lock): locks sharing a monitor get clash-free distinct cycles
    (:func:`dither_cycles`); groups with no monitor in common reuse them. The window is the
    shortest even one from 8 samples up that fits the largest group."""
    if not monitor_sets:
        raise ProcedureInputError("plan_dithers needs at least one lock")
    groups = monitor_groups(monitor_sets)
    largest = max(groups.count(g) for g in set(groups))
    window = MIN_WINDOW
    while True:
        try:
            cycles = dither_cycles(largest, window)
            break
        except ProcedureInputError:
            window += 2
            if window > 65536:
                raise
    out, used = [], {g: 0 for g in set(groups)}
    for g in groups:
        out.append(cycles[used[g]])
        used[g] += 1
    return window, out
