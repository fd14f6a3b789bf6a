"""A tunable coupler's calibration from bar and cross powers at swept volts.

kappa = P_cross / (P_bar + P_cross): the cross port's share of the light leaving the coupler, with
the "bar" port the same waveguide as the lit input (the convention of the simulator's 2x2 coupler
matrix). The ratio cancels the unknown input power and any loss common to both ports.

The measured ratios are noisy, and a calibration table must rise strictly with volts. The pool
adjacent violators algorithm (Ayer et al., Ann. Math. Stat. 26:641, 1955; Barlow et al.,
*Statistical Inference under Order Restrictions*, Wiley 1972) gives the least-squares
non-decreasing fit; each pooled block becomes one table point at the block's mean volts (the first
block at the sweep's first volts, so a sweep from 0 V gives a table from 0 V, and the flat start
of a coupler's curve sits at its lowest voltage as the mapping prefers). Only the rising part of a
sweep can be a table: past full transfer kappa falls again, so the sweep is cut at its largest
measured value.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.interpolate import PchipInterpolator
from scipy.optimize import brentq

from meshwarden.calibration import CalibrationTable
from meshwarden.procedures.inputs import (
    FloatArray,
    ProcedureInputError,
    float_vector,
    same_length,
    strictly_increasing,
)
from meshwarden.procedures.quality import GateResult, gate

MAX_RESIDUAL_KAPPA = 0.01  # the gate's default: rms of measured minus fitted kappa


def coupling_ratio(bar_power: Any, cross_power: Any) -> FloatArray:
    """kappa = P_cross / (P_bar + P_cross) point by point; both powers must be >= 0 with a positive sum."""
    bar = float_vector("bar_power", bar_power)
    cross = float_vector("cross_power", cross_power)
    same_length("bar_power", bar, "cross_power", cross)
    if np.any(bar < 0) or np.any(cross < 0):
        raise ProcedureInputError("bar and cross powers must be >= 0 (subtract the dark level first, clipped at 0)")
    total = bar + cross
    if np.any(total <= 0):
        raise ProcedureInputError(f"no light at point {int(np.flatnonzero(total <= 0)[0])}: bar + cross is 0")
    return np.asarray(cross / total)


def balanced_coupling_ratio(bar_power: Any, cross_power: Any) -> FloatArray:
    """kappa with the two paths' unequal transmissions to their taps taken out.

    The bar and the cross light reach their taps through different gates, so each port is seen
    scaled by its own fixed transmission (often tenths of a dB apart): the plain ratio is then off
    by up to the imbalance. A coupler conserves power (a lossless 2x2 is unitary; the common loss
    is a third constant), so at every sweep point ``w_b P_bar + w_c P_cross = 1`` for the same two
    unknown weights; least squares over the sweep finds them, and ``kappa = w_c P_cross`` (both
    weights' common factor cancels in the ratio). Needs kappa to vary over the sweep; falls back
    to the plain ratio when the system is ill-conditioned."""
    bar = float_vector("bar_power", bar_power)
    cross = float_vector("cross_power", cross_power)
    plain = coupling_ratio(bar, cross)
    weights = balance_weights(bar, cross)
    if weights is None:
        return plain
    w_bar, w_cross = weights
    return np.asarray(w_cross * cross / (w_bar * bar + w_cross * cross))


def balance_weights(bar_power: Any, cross_power: Any) -> tuple[float, float] | None:
    """The weights (w_b, w_c) of :func:`balanced_coupling_ratio`: least squares of
    ``w_b P_bar + w_c P_cross = 1`` over a sweep; None where kappa varies too little (its ratio
    spans less than 0.3), the system is ill-conditioned, or a weight comes out <= 0."""
    bar = float_vector("bar_power", bar_power)
    cross = float_vector("cross_power", cross_power)
    plain = coupling_ratio(bar, cross)
    design = np.column_stack([bar, cross])
    if plain.size < 3 or float(np.ptp(plain)) < 0.3 or np.linalg.cond(design) > 1e6:
        return None
    weights, *_ = np.linalg.lstsq(design, np.ones(bar.size), rcond=None)
    w_bar, w_cross = float(weights[0]), float(weights[1])
    if w_bar <= 0 or w_cross <= 0:
        return None
    return w_bar, w_cross


def isotonic_increasing(values: Any, weights: Any = None) -> FloatArray:
    """Least-squares non-decreasing fit of ``values`` (pool adjacent violators), optionally weighted."""
    y = float_vector("values", values)
    w = np.ones_like(y) if weights is None else float_vector("weights", weights)
    same_length("values", y, "weights", w)
    if np.any(w <= 0):
        raise ProcedureInputError("weights must be > 0")
    means: list[float] = []
    sizes: list[float] = []
    counts: list[int] = []
    for value, weight in zip(y, w, strict=True):
        means.append(float(value))
        sizes.append(float(weight))
        counts.append(1)
        while len(means) > 1 and means[-2] > means[-1]:
            total = sizes[-2] + sizes[-1]
            means[-2] = (means[-2] * sizes[-2] + means[-1] * sizes[-1]) / total
            sizes[-2] = total
            counts[-2] += counts[-1]
            del means[-1], sizes[-1], counts[-1]
    return np.repeat(np.array(means), counts)


@dataclass(frozen=True)
class CouplerTableFit:
    """A monotone kappa(V) table and the numbers that say how far to trust it."""

    volts: tuple[float, ...]
    kappa: tuple[float, ...]
    points: int
    points_used: int
    residual_rms: float
    kappa_low: float
    kappa_high: float
    largest_drop: float
    pooled_points: int
    measured_kappa: tuple[float, ...] = ()  # per sweep point, as measured (the plot's points)
    fitted_kappa: tuple[float, ...] = ()  # per point used, the monotone fit (past the top: not used)
    full_transfer_volts: float | None = None
    second_input_share: float = 0.0

    def to_calibration(self, actuator: str, version: str, note: str = "") -> CalibrationTable:
        """The table as a measured coupler calibration."""
        return CalibrationTable(actuator, "coupler", version, "measured", self.volts, self.kappa, note)

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {
            "volts": list(self.volts),
            "kappa": list(self.kappa),
            "points": self.points,
            "points_used": self.points_used,
            "residual_rms": self.residual_rms,
            "kappa_low": self.kappa_low,
            "kappa_high": self.kappa_high,
            "largest_drop": self.largest_drop,
            "pooled_points": self.pooled_points,
            "measured_kappa": list(self.measured_kappa),
            "fitted_kappa": list(self.fitted_kappa),
            "full_transfer_volts": self.full_transfer_volts,
            "second_input_share": self.second_input_share,
        }


def _sweep_ratios(volts: Any, bar_power: Any, cross_power: Any, balance: bool) -> tuple[FloatArray, FloatArray]:
    """A sweep's volts (checked: ascending, from >= 0) and its kappa per point."""
    v = float_vector("volts", volts, min_length=2)
    kappa = balanced_coupling_ratio(bar_power, cross_power) if balance else coupling_ratio(bar_power, cross_power)
    same_length("volts", v, "bar_power", kappa)
    strictly_increasing("volts", v)
    if v[0] < 0:
        raise ProcedureInputError("volts must be >= 0")
    return v, kappa


def fit_coupler_table(volts: Any, bar_power: Any, cross_power: Any, *, balance: bool = False) -> CouplerTableFit:
    """Monotone kappa(V) from a sweep (volts ascending) of bar and cross powers.

    ``residual_rms`` is the rms of measured minus fitted kappa over the points used;
    ``largest_drop`` the largest fall of raw kappa from one point to the next (noise, or a
    non-monotone device); ``pooled_points`` how many points the monotone fit had to merge.
    """
    v, kappa = _sweep_ratios(volts, bar_power, cross_power, balance)
    # Past the top (full transfer) the curve falls: keep the sweep up to its highest measured kappa.
    used = int(np.argmax(kappa)) + 1
    fitted = isotonic_increasing(kappa[:used])
    v_used, k_used = v[:used], kappa[:used]
    starts = np.flatnonzero(np.r_[True, np.diff(fitted) > 0])
    ends = np.r_[starts[1:], used]
    table_volts = [float(v_used[0])] + [float(v_used[a:b].mean()) for a, b in zip(starts[1:], ends[1:], strict=True)]
    table_kappa = [float(fitted[a]) for a in starts]
    if len(table_volts) < 2:
        raise ProcedureInputError("kappa does not rise over the sweep: no table can be made (is the coupler moving?)")
    drops = -np.diff(kappa[:used])  # past full transfer the fall is the device's, not noise
    return CouplerTableFit(
        volts=tuple(table_volts),
        kappa=tuple(table_kappa),
        points=int(v.size),
        points_used=used,
        residual_rms=math.sqrt(float(np.mean((k_used - fitted) ** 2))),
        kappa_low=float(fitted[0]),
        kappa_high=float(fitted[-1]),
        largest_drop=float(max(drops.max(initial=0.0), 0.0)),
        pooled_points=int(used - starts.size),
        measured_kappa=tuple(float(k) for k in kappa),
        fitted_kappa=tuple(float(k) for k in fitted),
    )


def coupler_gate(
    fit: CouplerTableFit,
    *,
    needed_low: float = 0.05,
    needed_high: float = 0.95,
    min_points: int = 8,
    max_residual: float = MAX_RESIDUAL_KAPPA,
    max_drop: float = 0.05,
) -> GateResult:
    """Whether a coupler table may be activated: enough points, small residual, the needed kappa range
    covered (a mesh needs kappa from near 0 to near 1), and no large fall in the raw data."""
    checks = {
        "points": float(fit.points),
        "points_used": float(fit.points_used),
        "residual_rms": fit.residual_rms,
        "kappa_low": fit.kappa_low,
        "kappa_high": fit.kappa_high,
        "largest_drop": fit.largest_drop,
    }
    failures = []
    if fit.points_used < min_points:
        failures.append(f"only {fit.points_used} points on the rising curve (need {min_points})")
    if fit.residual_rms > max_residual:
        failures.append(f"residual {fit.residual_rms:.3g} in kappa (limit {max_residual:g})")
    if fit.kappa_low > needed_low or fit.kappa_high < needed_high:
        failures.append(
            f"covers kappa {fit.kappa_low:.3g} to {fit.kappa_high:.3g} (need {needed_low:g} to {needed_high:g})"
        )
    if fit.largest_drop > max_drop:
        failures.append(f"kappa falls by {fit.largest_drop:.3g} between neighbouring points (limit {max_drop:g})")
    return gate(checks, failures)


HALF_PI = math.pi / 2
TABLE_STEPS_PER_INTERVAL = 12  # table points per measured interval, from the fit in angle space
FOLD_ANGLE_RAD = 0.05  # a point this close to full transfer reads its kappa within 0.0025 of the top
CLEARLY_SMOOTHER = 0.5
TOP_NOISE = 0.005  # how far above 1 - r the highest reading may lie (noise)
MAX_SECOND_INPUT_SHARE = 0.2  # more light than this in the other input is a routing fault, not a leak


def unfold_coupling_angle(kappa: Any, volts: Any = None) -> tuple[FloatArray, int]:
    """The coupling angle theta (kappa = sin^2 theta) of each point of a sweep, unfolded past full
    transfer; returns (theta, points used).

    theta grows monotonically with the drive, while kappa folds back at theta = pi/2. Up to the
    largest kappa theta = asin(sqrt(kappa)); after it, pi - asin(sqrt(kappa)), down to the smallest
    kappa after the top (theta = pi; later points are dropped). The top point itself may lie on
    either side of the turn: it takes the side closer to a quadratic through its unfolded
    neighbours (two on each side where there are; ``volts`` spaces them, evenly when not given)."""
    k = np.clip(float_vector("kappa", kappa, min_length=2), 0.0, 1.0)
    x = np.arange(k.size, dtype=float) if volts is None else float_vector("volts", volts)
    same_length("kappa", k, "volts", x)
    top = int(np.argmax(k))
    used = k.size if top == k.size - 1 else top + 2 + int(np.argmin(k[top + 1 :]))
    theta = np.arcsin(np.sqrt(k[:used]))
    after = np.arange(used) > top
    theta[after] = math.pi - theta[after]
    if 0 < top < used - 1:
        near = [i for i in (top - 2, top - 1, top + 1, top + 2) if 0 <= i < used]
        coefficients = np.polyfit(x[near], theta[near], min(2, len(near) - 1))
        expected = float(np.polyval(coefficients, x[top]))
        if abs((math.pi - theta[top]) - expected) < abs(theta[top] - expected):
            theta[top] = math.pi - theta[top]  # the turn lies between the previous point and the top
    return np.asarray(theta), used


def fit_coupler_angle_table(
    volts: Any, bar_power: Any, cross_power: Any, *, balance: bool = True, known_share: float | None = None
) -> CouplerTableFit:
    """Monotone kappa(V) from a sweep that may run past full transfer, fitted in angle space.

    Coupled-mode theory gives kappa = sin^2(C L) for a directional coupler (Yariv, IEEE J. Quantum
    Electron. 9:919, 1973; Haus & Huang, Proc. IEEE 79:1505, 1991): the coupling angle theta = C L
    grows smoothly with the drive (C rises as the gap closes), and kappa's flat top and flat start
    are only sin^2 folding it. So the sweep is unfolded to theta (:func:`unfold_coupling_angle`),
    fitted non-decreasing there (pool adjacent violators, each point weighted by how well it
    fixes theta: sin^2(2 theta), floored, since d kappa / d theta vanishes at the fold), and the
    table is sin^2 of a monotone cubic (PCHIP, Fritsch & Carlson, SIAM J. Numer. Anal. 17:238,
    1980) through the pooled angles, sampled densely, up to where theta reaches pi/2: full
    transfer, located between the measured points on either side of it. A sweep that never
    passes the top ends at its last point, like :func:`fit_coupler_table`.

    Light in the coupler's other input too (a share r of the two, leaked into it by gates at
    rest upstream) reads as kappa_measured = r + (1 - 2 r) kappa: at full transfer that light
    leaves at the bar port, so the ratio tops out at 1 - r. When the sweep crosses full transfer,
    r is found (:func:`second_input_share`) and taken out (``second_input_share`` of the fit).
    A sweep that does not cross it takes ``known_share`` instead, when given (measured otherwise:
    :func:`mixed_share_from_swing`)."""
    v, kappa = _sweep_ratios(volts, bar_power, cross_power, balance)
    fit = _fit_angles(v, kappa)
    if fit.full_transfer_volts is None and not known_share:
        return fit
    if known_share is not None and not 0.0 <= known_share < 0.5:
        raise ProcedureInputError(f"known_share must be from 0 to below 0.5, got {known_share}")
    share = second_input_share(v, kappa) if fit.full_transfer_volts is not None else float(known_share or 0.0)
    if share == 0.0:
        return fit
    corrected = np.clip((kappa - share) / (1.0 - 2.0 * share), 0.0, 1.0)
    return dataclasses.replace(_fit_angles(v, corrected), second_input_share=share)


def widest_gap_volts(fit: CouplerTableFit, volts: Any, max_gap: float) -> float | None:
    """Volts halfway (in the table's kappa) across the widest step of kappa between measured
    points below full transfer, if that step is wider than ``max_gap``; else None. A sweep even in
    a design table's kappa samples a real coupler unevenly (its curve sits a volt or two off the
    design's): the steepest stretch, just below full transfer, may get a step of 0.2 in kappa,
    where even a good interpolant strays by 0.01."""
    top = fit.full_transfer_volts if fit.full_transfer_volts is not None else fit.volts[-1]
    at = np.array(sorted(float(x) for x in float_vector("volts", volts) if x <= top + 1e-9))
    if at.size < 2:
        return None
    kappa = np.interp(at, fit.volts, fit.kappa)
    if fit.full_transfer_volts is not None and at[-1] < top - 1e-9:
        at, kappa = np.r_[at, top], np.r_[kappa, 1.0]
    steps = np.diff(kappa)
    i = int(np.argmax(steps))
    if steps[i] <= max_gap:
        return None
    middle = 0.5 * (kappa[i] + kappa[i + 1])
    return float(np.interp(middle, fit.kappa, fit.volts))


def mixed_share_from_swing(kappa: float, swing: float) -> float:
    """The power share r that a small coherent field mixes in, from the swing it causes.

    Two fields of powers 1 - r and r meeting in a coupler of ratio kappa (or a coupler's two
    outputs, kappa and 1 - kappa, meeting in a gate of ratio r) give, at either port, a term
    2 sqrt(kappa (1 - kappa)) sqrt(r (1 - r)) cos(psi) on top of their incoherent sum (the
    standard 2x2 coupler matrix applied to both inputs), psi their relative phase. ``swing`` is
    that term's amplitude, read as a ratio of the port's power to both ports' (half the
    peak-to-peak change as psi turns a full circle); r (below 1/2) follows from
    r (1 - r) = swing^2 / (4 kappa (1 - kappa)). It is the share by which the incoherent sum
    misreads kappa: r + (1 - 2 r) kappa."""
    if not (0.0 < kappa < 1.0 and math.isfinite(swing) and swing >= 0.0):
        raise ProcedureInputError(f"need 0 < kappa < 1 and a swing >= 0, got kappa {kappa}, swing {swing}")
    product = min(swing * swing / (4.0 * kappa * (1.0 - kappa)), 0.25)
    return 0.5 * (1.0 - math.sqrt(1.0 - 4.0 * product))


def combined_share(shares: Any) -> float:
    """The one share r equivalent to several mixings in a row: each maps a ratio k to
    r_i + (1 - 2 r_i) k, so 1 - 2 r = product of (1 - 2 r_i) (composition of the affine maps)."""
    values = float_vector("shares", shares, min_length=0)
    if np.any(values < 0.0) or np.any(values >= 0.5):
        raise ProcedureInputError("every share must be from 0 to below 0.5")
    return float(0.5 * (1.0 - np.prod(1.0 - 2.0 * values)))


def second_input_share(volts: Any, kappa: Any) -> float:
    """The share r of light in a coupler's other input, from a sweep across full transfer.

    Measured ratios are r + (1 - 2 r) kappa; only the right r makes the unfolded angle a smooth
    curve through pi/2 (a wrong one folds the top flat below or clips it above). Each r on a grid
    of 0.002 is tried, up to what the highest reading allows (it is at most 1 - r, within
    TOP_NOISE); the one whose unfolded angles above kappa 0.3 (five at least) a quadratic in V
    fits best wins, if it fits clearly better than r = 0 (rms below CLEARLY_SMOOTHER of it).
    0 when fewer than two points lie on each side of the top."""
    v = float_vector("volts", volts, min_length=2)
    k = float_vector("kappa", kappa, min_length=2)
    top = int(np.argmax(k))
    if top < 2 or k.size - top < 3:
        return 0.0
    best, best_rms, plain = 0.0, math.inf, math.inf
    ceiling = min(MAX_SECOND_INPUT_SHARE, 1.0 - float(k[top]) + TOP_NOISE)  # the top reads 1 - r at most
    for r in np.arange(0.0, ceiling + 1e-12, 0.002):
        corrected = np.clip((k - r) / (1.0 - 2.0 * r), 0.0, 1.0)
        theta, used = unfold_coupling_angle(corrected, v)
        upper = [i for i in range(used) if corrected[i] > 0.3]
        if len(upper) < 5:
            continue
        coefficients = np.polyfit(v[upper], theta[upper], 2)
        rms = float(np.sqrt(np.mean((np.polyval(coefficients, v[upper]) - theta[upper]) ** 2)))
        if r == 0.0:
            plain = rms
        if rms < best_rms - 1e-12:
            best, best_rms = float(r), rms
    # A share is taken only where it makes the curve clearly smoother than none does.
    return best if best_rms < CLEARLY_SMOOTHER * plain else 0.0


MIN_ANGLE_RAD = 1e-3  # angles are interpolated on a log scale: a bar reading of exactly 0 sits here


def angle_curve(volts: Any, theta: Any) -> Callable[[Any], FloatArray]:
    """A monotone curve theta(V) through measured coupling angles, for the points between them.

    The coupling coefficient of a directional coupler falls exponentially with its gap, C = C0
    exp(-gamma g) (Chrostowski & Hochberg, *Silicon Photonics Design*, CUP 2015), and a parallel
    plate's travel grows as V^2 while it is small against its gap (F = eps0 A V^2 / (2 g^2) on a
    spring; Senturia, *Microsystem Design*, 2001, ch. 6): log theta is nearly linear in V^2 where
    theta itself curves steeply up in V. A monotone cubic (PCHIP; Fritsch & Carlson, SIAM J.
    Numer. Anal. 17:238, 1980) through (V^2, log theta) therefore follows the curve between
    sparse points far closer than one through (V, theta), whose slopes at the knots (a harmonic
    mean of the two sides) flatten a steep convex curve. ``volts`` strictly increasing, from >= 0;
    ``theta`` non-decreasing (angles below MIN_ANGLE_RAD count as it)."""
    v = float_vector("volts", volts, min_length=2)
    t = float_vector("theta", theta, min_length=2)
    same_length("volts", v, "theta", t)
    strictly_increasing("volts", v)
    if v[0] < 0 or np.any(np.diff(t) < 0):
        raise ProcedureInputError("volts must be >= 0 and theta non-decreasing")
    log_curve = PchipInterpolator(v * v, np.log(np.maximum(t, MIN_ANGLE_RAD)))

    def curve(x: Any) -> FloatArray:
        return np.asarray(np.exp(log_curve(np.square(np.asarray(x, dtype=float)))))

    return curve


def _fit_angles(v: FloatArray, kappa: FloatArray) -> CouplerTableFit:
    """The angle-space fit of :func:`fit_coupler_angle_table` on ratios already made."""
    theta, used = unfold_coupling_angle(kappa, v)
    weights = np.maximum(np.sin(2 * theta) ** 2, 0.05)
    fitted = isotonic_increasing(theta, weights)
    v_used = v[:used]
    starts = np.flatnonzero(np.r_[True, np.diff(fitted) > 0])
    ends = np.r_[starts[1:], used]
    block_volts = np.array([v_used[0]] + [v_used[a:b].mean() for a, b in zip(starts[1:], ends[1:], strict=True)])
    block_theta = fitted[starts]
    if block_volts.size < 2:
        raise ProcedureInputError("kappa does not rise over the sweep: no table can be made (is the coupler moving?)")
    curve = angle_curve(block_volts, block_theta)
    full: float | None = None
    beyond = np.flatnonzero(block_theta >= HALF_PI)
    if beyond.size and beyond[0] > 0:
        i = int(beyond[0])
        full = float(brentq(lambda x: float(curve(x)) - HALF_PI, block_volts[i - 1], block_volts[i]))
    rising = [float(x) for x in block_volts[block_theta < HALF_PI]] if full is not None else list(block_volts)
    knots = rising + ([full] if full is not None and full > rising[-1] else [])
    grid = [float(knots[0])]
    for a, b in itertools.pairwise(knots):
        grid += [float(a + (b - a) * j / TABLE_STEPS_PER_INTERVAL) for j in range(1, TABLE_STEPS_PER_INTERVAL + 1)]
    angles = np.minimum(curve(np.array(grid)), HALF_PI)
    if full is not None:
        angles[-1] = HALF_PI
    table_kappa = np.sin(angles) ** 2
    keep = np.r_[True, np.diff(table_kappa) > 1e-12]
    model = np.sin(fitted) ** 2
    rising_raw = kappa[: int(np.argmax(kappa)) + 1]
    drops = -np.diff(rising_raw)
    return CouplerTableFit(
        volts=tuple(float(x) for x in np.array(grid)[keep]),
        kappa=tuple(float(x) for x in table_kappa[keep]),
        points=int(v.size),
        points_used=used,
        residual_rms=math.sqrt(float(np.mean((np.clip(kappa[:used], 0, 1) - model) ** 2))),
        kappa_low=float(table_kappa[0]),
        kappa_high=float(table_kappa[keep][-1]),
        largest_drop=float(max(drops.max(initial=0.0), 0.0)),
        pooled_points=int(used - starts.size),
        measured_kappa=tuple(float(k) for k in kappa),
        fitted_kappa=tuple(float(k) for k in model),
        full_transfer_volts=full,
    )
