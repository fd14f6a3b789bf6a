"""Lock-in demodulation of a shared monitor stream, and the normalised PI step of a lock.

Orthogonal dithers. Lock i moves its actuator by a_i sin(2 pi k_i n / N) over a window of N
samples, k_i an integer number of cycles per window, so the sines and cosines of distinct bins are
exactly orthogonal over the window (the discrete Fourier basis). :func:`dither_cycles` picks the
k_i so that no harmonic or intermodulation product of order <= 2 (or 3) that involves another lock lands
on any lock's 1f or 2f bin (a monitor seeing several locks contains every such product), and every
bin stays below the Nyquist limit. Terms where one lock's +k and -k cancel (a_j^2 a_i f_jji at
k_i) only scale lock i's own response slightly, like its own cubic term, and are not clashes.
Third-order products are smaller than second-order ones by about the dither amplitude a (rad),
so order 2 is the default; order 3 costs a much longer window for the same number of locks.

Demodulation. For y = f(x0 + a sin wt) averaged over whole cycles (Taylor expansion; the method of
extremum seeking, Krstic & Wang, Automatica 36:595, 2000):

    2 <y sin wt>   = a f'(x0) + a^3 f'''(x0) / 8     -> slope     = 2 <y sin wt> / a
    2 <y cos 2wt>  = -a^2 f''(x0) / 4                -> curvature = -8 <y cos 2wt> / a^2

The slope's bias a^2 f''' / 8 is below 1e-4 of f' for the dithers used (a ~ 0.01-0.1 rad).

Loop. Each window gives an error e (the demodulated slope when holding an extremum, the measured
value minus its target when holding a level) and the error's slope s = de/dx, taken from the
calibration: the fringe's curvature at the extremum (negative at a maximum), or the level's slope.
A measured curvature would not do for s: its sign flips past the fringe's inflection and the loop
would head for the nearest extremum of either kind. The PI step in velocity form

    dx_n = -(K_i e_n + K_p (e_n - e_{n-1})) / s

makes a loop whose plant slope equals s a standard discrete first-order loop for K_p = 0: the
error decays as (1 - K_i)^n, stable for 0 < K_i r < 2 when the true slope is r times the assumed
one (common practice; any control text, e.g. Ogata, *Discrete-Time Control Systems*). One
correction per window keeps the loop's bandwidth (about K_i / (2 pi N dt)) below the dither rate
k_i / (N dt), the separation of time scales that extremum seeking needs (Krstic & Wang 2000).

Power penalty. At a fringe peak P = P_max (1 + cos phi) / 2, a dither a sin wt of the phase costs
on average (1 - J0(a)) / 2 of P_max (Bessel's integral for J0), about a^2 / 8.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import j0

from meshwarden.procedures.inputs import FloatArray, ProcedureInputError, float_vector
from meshwarden.procedures.quality import plain_dict


def _alias(value: int, window_samples: int) -> int:
    value %= window_samples
    return min(value, window_samples - value)


def _clash(cycles: list[int], window_samples: int, order: int) -> bool:
    """True if some product of order <= ``order`` involving another lock hits a lock's 1f or 2f bin."""
    bins: dict[int, set[int]] = {}
    for i, k in enumerate(cycles):
        for b in (k, 2 * k):
            bins.setdefault(_alias(b, window_samples), set()).add(i)
    terms = [(0, -1)] + [(s * k, i) for i, k in enumerate(cycles) for s in (1, -1)]
    for combo in itertools.combinations_with_replacement(terms, order):
        hit = bins.get(_alias(sum(v for v, _ in combo), window_samples))
        if hit:
            # A lock whose + and - terms cancel only scales the others' response: it is not a clash.
            net: dict[int, int] = {}
            for v, i in combo:
                if i >= 0:
                    net[i] = net.get(i, 0) + (1 if v > 0 else -1)
            support = {i for i, n in net.items() if n}
            if any(support - {i} for i in hit):
                return True
    return False


def dither_cycles(locks: int, window_samples: int, *, order: int = 2) -> tuple[int, ...]:
    """Cycles per window for ``locks`` dithers: the smallest greedy choice free of clashes (see module doc)."""
    if isinstance(locks, bool) or not isinstance(locks, int) or locks < 1:
        raise ProcedureInputError(f"locks must be an integer >= 1, got {locks!r}")
    if isinstance(window_samples, bool) or not isinstance(window_samples, int) or window_samples < 8:
        raise ProcedureInputError(f"window_samples must be an integer >= 8, got {window_samples!r}")
    if order not in (2, 3):
        raise ProcedureInputError(f"order must be 2 or 3, got {order!r}")
    chosen: list[int] = []
    for k in range(1, window_samples // 4):  # 2k must stay below the Nyquist bin N/2
        if len(chosen) == locks:
            break
        if not _clash([*chosen, k], window_samples, order):
            chosen.append(k)
    if len(chosen) < locks:
        raise ProcedureInputError(
            f"{window_samples} samples per window fit only {len(chosen)} clash-free dithers; {locks} asked "
            "(use a longer window)"
        )
    return tuple(chosen)


def dither_offsets(cycles: Any, amplitudes: Any, window_samples: int) -> FloatArray:
    """Offsets a_i sin(2 pi k_i n / N) to add to each lock's actuator, shape (locks, N)."""
    k = float_vector("cycles", cycles)
    a = float_vector("amplitudes", amplitudes)
    if k.shape != a.shape:
        raise ProcedureInputError(f"cycles has {k.size} entries but amplitudes has {a.size}")
    n = np.arange(window_samples)
    return np.asarray(a[:, None] * np.sin(2 * math.pi * k[:, None] * n[None, :] / window_samples))


@dataclass(frozen=True)
class Demodulated:
    """Per lock: slope f' and curvature f'' of the monitor against its actuator, and the window mean."""

    slope: tuple[float, ...]
    curvature: tuple[float, ...]
    mean: float

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return plain_dict({"slope": self.slope, "curvature": self.curvature, "mean": self.mean})


def demodulate(samples: Any, cycles: Any, amplitudes: Any) -> Demodulated:
    """Demodulate one window of a monitor shared by several dithered locks (1f slope, 2f curvature)."""
    y = float_vector("samples", samples, min_length=8)
    k = float_vector("cycles", cycles)
    a = float_vector("amplitudes", amplitudes)
    if k.shape != a.shape:
        raise ProcedureInputError(f"cycles has {k.size} entries but amplitudes has {a.size}")
    if np.any(a <= 0) or np.any(k < 1) or np.any(k != np.round(k)) or np.any(2 * k >= y.size / 2):
        raise ProcedureInputError("amplitudes must be > 0 and cycles whole numbers with 2 k below N/2")
    n = np.arange(y.size)
    phase = 2 * math.pi * k[:, None] * n[None, :] / y.size
    first = 2.0 * np.mean(y[None, :] * np.sin(phase), axis=1)
    second = 2.0 * np.mean(y[None, :] * np.cos(2.0 * phase), axis=1)
    return Demodulated(
        slope=tuple(float(v) for v in first / a),
        curvature=tuple(float(v) for v in -4.0 * second / a**2),
        mean=float(np.mean(y)),
    )


def pi_step(
    error: float,
    error_slope: float,
    *,
    integral_gain: float,
    proportional_gain: float = 0.0,
    previous_error: float = 0.0,
    max_step: float = math.inf,
) -> float:
    """Actuator correction -(K_i e + K_p (e - e_prev)) / s, clipped to +-``max_step``."""
    for name, value in (("error", error), ("previous_error", previous_error), ("error_slope", error_slope)):
        if not math.isfinite(value):
            raise ProcedureInputError(f"{name} must be finite, got {value}")
    if error_slope == 0.0:
        raise ProcedureInputError("error_slope is 0: the loop cannot tell which way to move")
    if not 0.0 < integral_gain < 2.0 or not 0.0 <= proportional_gain < 2.0:
        raise ProcedureInputError("gains must satisfy 0 < integral_gain < 2 and 0 <= proportional_gain < 2")
    step = -(integral_gain * error + proportional_gain * (error - previous_error)) / error_slope
    if not max_step > 0:
        raise ProcedureInputError(f"max_step must be > 0, got {max_step}")
    return max(-max_step, min(max_step, step))


def loop_poles(integral_gain: float, proportional_gain: float = 0.0, slope_ratio: float = 1.0) -> tuple[complex, ...]:
    """Poles of the closed loop e_{n+1} = e_n - r (K_i e_n + K_p (e_n - e_{n-1})); stable if all |z| < 1."""
    r = slope_ratio
    roots = np.roots([1.0, -(1.0 - r * (integral_gain + proportional_gain)), -r * proportional_gain])
    return tuple(complex(z) for z in roots)


def dither_power_penalty(amplitude_rad: float) -> float:
    """Mean fraction of the peak power lost to a phase dither of ``amplitude_rad`` held at a fringe peak."""
    if not math.isfinite(amplitude_rad):
        raise ProcedureInputError(f"amplitude_rad must be finite, got {amplitude_rad}")
    return float((1.0 - j0(amplitude_rad)) / 2.0)
