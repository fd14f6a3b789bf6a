"""How much of a scan's response belongs to the actuator that was stepped, and what a working one would show.

Crosstalk: electrostatic force grows as V^2 whatever the polarity (Senturia, *Microsystem Design*, 2001, ch. 6),
so when an actuator's drive changes by d(V^2) its neighbours move as if their own drive had changed by a share
f of it. A neighbour n whose own step d(V_n^2) gave the response r_n at a monitor therefore gives at most
f_max |d(V^2)| (|r_n| + k se_n) / |d(V_n^2)| there (linear for small steps), whatever f <= f_max really is;
summed over the neighbours that is the most a stuck actuator's step could appear to do. The share itself is
measured by the scan where a monitor sees a neighbour but not the actuator (:func:`estimate_share`), separately
within a gate and between gates; where nothing measures it, a configured bound stands in.

Second looks: a working actuator whose operating point sits at an extremum of its fringe P = B + A cos(theta)
has no first-order response; a step of d theta then changes P by A (1 - cos d theta) (the second-order part,
standard trigonometry). For a phase theta is the phase itself; for a coupler with kappa = sin^2(theta/2)
(the coupled-mode power transfer, Yariv 1973), d kappa = sqrt(kappa (1 - kappa)) d theta, and a fringe slope of
S per unit kappa is an amplitude A = S sqrt(kappa (1 - kappa)).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from meshwarden.procedures.inputs import FloatArray, ProcedureInputError


def crosstalk_bounds(
    responses: Any,
    response_se: Any,
    dv2: Sequence[float],
    neighbours: Sequence[Sequence[tuple[int, float]]],
    k_sigma: float,
) -> FloatArray:
    """Per actuator and monitor: sum over its neighbours (index, share bound f) of f (|r_n| + k se_n) / |d(V_n^2)|
    (amps per V^2). Multiply a row by |d(V^2)| of that actuator's own step for its crosstalk bound at each monitor."""
    r = np.abs(np.asarray(responses, dtype=float))
    se = np.asarray(response_se, dtype=float)
    if r.shape != se.shape or r.shape[0] != len(dv2) or len(neighbours) != len(dv2):
        raise ProcedureInputError("responses, their errors, steps and neighbours must agree in length")
    out = np.zeros_like(r)
    for j, near in enumerate(neighbours):
        for n, share in near:
            if n != j and dv2[n] != 0.0:
                out[j] += share * (r[n] + k_sigma * se[n]) / abs(dv2[n])
    return np.asarray(out, dtype=float)


@dataclass(frozen=True)
class ShareEstimate:
    """A crosstalk share measured by the scan: estimate, standard error, how many monitor readings it rests on."""

    share: float
    share_se: float
    samples: int

    def upper(self, k_sigma: float) -> float:
        """The share it cannot exceed at k sigma."""
        return max(self.share, 0.0) + k_sigma * self.share_se


def estimate_share(
    responses: Any, response_se: Any, dv2: Sequence[float], pairs: Sequence[tuple[int, int, int]], k_sigma: float
) -> ShareEstimate | None:
    """The crosstalk share f from monitors that see a neighbour but not the actuator itself.

    For (j, n, k): monitor k cannot see actuator j (first order), but sees its neighbour n, whose own step
    d(V_n^2) gave r_n there. Whatever j's step moved at k went through n: r_j = f d(V_j^2) r_n / d(V_n^2) + noise
    (se_j). Weighted least squares over every such reading with r_n clear of k se_n gives f and its standard error
    (standard weighted regression through the origin). None where no reading qualifies.
    """
    r = np.asarray(responses, dtype=float)
    se = np.asarray(response_se, dtype=float)
    xs, ys, ws = [], [], []
    for j, n, k in pairs:
        if dv2[n] == 0.0 or abs(r[n, k]) < k_sigma * se[n, k]:
            continue
        xs.append(dv2[j] * r[n, k] / dv2[n])
        ys.append(r[j, k])
        ws.append(1.0 / se[j, k] ** 2)
    if not xs:
        return None
    x, y, w = np.array(xs), np.array(ys), np.array(ws)
    info = float(np.sum(w * x * x))
    if info <= 0.0:
        return None
    return ShareEstimate(float(np.sum(w * x * y)) / info, 1.0 / math.sqrt(info), len(xs))


def angle_step(attribute: str, value_step: float, kappa: float | None) -> float:
    """A step of the calibrated value as a step of the fringe's angle (rad): itself for a phase; for a coupler
    d theta = d kappa / sqrt(kappa (1 - kappa)) (kappa = sin^2(theta / 2))."""
    if attribute == "phase":
        return value_step
    k = min(max(0.5 if kappa is None else kappa, 0.01), 0.99)
    return value_step / math.sqrt(k * (1.0 - k))


def amplitude_of(attribute: str, slope_per_value: float, kappa: float | None) -> float:
    """A fringe's amplitude A from its steepest slope per unit of value (see the module notes)."""
    if attribute == "phase":
        return abs(slope_per_value)
    k = min(max(0.5 if kappa is None else kappa, 0.01), 0.99)
    return abs(slope_per_value) * math.sqrt(k * (1.0 - k))


def least_sigmas(amplitude: float, looks: Sequence[tuple[float, float, float]], points: int = 3600) -> float:
    """The least, over every operating angle, of the clearest of several looks at a fringe A cos(theta).

    Each look is (angle step, amount any other cause could give, sigma): a working actuator at angle theta shows
    (A |cos(theta + step) - cos(theta)| - amount) / sigma there. An actuator whose looks all stayed below this
    could still be working (its operating angle unlucky); above it, a working one could not have hidden.
    """
    theta = np.linspace(0.0, 2.0 * math.pi, points, endpoint=False)
    best = np.full(points, -np.inf)
    for step, other, sigma in looks:
        if sigma <= 0.0:
            raise ProcedureInputError(f"sigma must be > 0, got {sigma!r}")
        shown = (amplitude * np.abs(np.cos(theta + step) - np.cos(theta)) - other) / sigma
        best = np.maximum(best, shown)
    return float(best.min())


def coupling_angle(kappa: float) -> float:
    """The coupled-mode angle theta (rad) of a power coupling, kappa = sin^2(theta / 2) (0 <= theta <= pi)."""
    return 2.0 * math.asin(math.sqrt(min(max(kappa, 0.0), 1.0)))


def offset_fringe_sigmas(offset: float, looks: Sequence[tuple[float, float, float]]) -> float:
    """The least, over every fringe consistent with a measured offset, of the clearest of several looks.

    A fringe D0 + R cos(theta - alpha) seen at an angle where its offset from the middle, D = R cos(phi), is known
    (``offset``) but R sin(phi) = Q is not changes by -(D (1 - cos s) + Q sin s) when the angle turns by s
    (standard trigonometry). Each look is (angle step s, amount any other cause could give, sigma); the result is
    min over Q of max over the looks of (|D (1 - cos s) + Q sin s| - amount) / sigma: a working actuator shows at
    least this many sigma in one of its looks, whatever Q is. Two looks of different size (or of opposite sign)
    leave no Q where both show nothing unless D = 0. Each term is |alpha + beta Q| - gamma, so the maximum is
    convex and piecewise linear in Q: its least lies where one term bends or two pieces meet, tried exactly.
    """
    terms = []
    for step, other, sigma in looks:
        if sigma <= 0.0:
            raise ProcedureInputError(f"sigma must be > 0, got {sigma!r}")
        terms.append((offset * (1.0 - math.cos(step)) / sigma, math.sin(step) / sigma, other / sigma))
    if not terms:
        return 0.0
    candidates = [0.0] + [-a / b for a, b, _ in terms if b != 0.0]
    for i, (a1, b1, g1) in enumerate(terms):
        for a2, b2, g2 in terms[i + 1 :]:
            for s1 in (1.0, -1.0):
                for s2 in (1.0, -1.0):
                    if s1 * b1 - s2 * b2 != 0.0:
                        candidates.append((g1 - g2 - s1 * a1 + s2 * a2) / (s1 * b1 - s2 * b2))
    return float(min(max(abs(a + b * q) - g for a, b, g in terms) for q in candidates))


def mixer_phase_sigmas(
    offset_w: float,
    total_w: float,
    kappas: Sequence[float],
    looks: Sequence[tuple[float, float, float]],
    points: int = 4001,
) -> float:
    """The least a working phase shows (sigmas) in one of its looks at the coupler where its arm meets other light,
    over every input split consistent with that coupler's outputs.

    With inputs A and B (A + B = S) at relative phase psi, the coupler's top output less S/2 is
    D = x cos(theta) - sqrt(A B) sin(theta) sin(psi), x = (A - B)/2, sqrt(A B) = sqrt(S^2/4 - x^2), kappa =
    sin^2(theta/2) (coupled-mode algebra, Yariv 1973); a phase step s changes it by -M (sin(psi +- s) - sin(psi)),
    M = sin(theta) sqrt(S^2/4 - x^2). Given the measured D (``offset_w``) and S (``total_w``), every x on a grid
    (``GRID_SAFETY`` of the least is returned, for what falls between its points) and each ratio in ``kappas`` is
    tried with the psi that explains D (two per x), both signs of the step; the
    least of the clearest look is returned (0 where some split, such as all the light in one input, explains D with
    a phase that shows nothing). Each look is (phase step s, amount any other cause could give, sigma).
    """
    if total_w <= 0.0 or not looks:
        return 0.0
    for _, _, sigma in looks:
        if sigma <= 0.0:
            raise ProcedureInputError(f"sigma must be > 0, got {sigma!r}")
    # x = (S/2) cos(beta), sqrt(A B) = (S/2) sin(beta): a grid in beta, finer toward all the light in one input
    # (where the least is often found), and a tenth taken off the result for what falls between its points
    edge = math.pi * np.logspace(-7.0, -1.0, points // 4)
    beta = np.unique(np.concatenate([np.linspace(0.0, math.pi, points), edge, math.pi - edge]))
    x = total_w / 2.0 * np.cos(beta)
    root = total_w / 2.0 * np.sin(beta)
    least = math.inf
    for kappa in kappas:
        k = min(max(kappa, 0.0), 1.0)
        cos_t, sin_t = 1.0 - 2.0 * k, 2.0 * math.sqrt(k * (1.0 - k))
        amplitude = sin_t * root
        need = x * cos_t - offset_w  # = amplitude sin(psi)
        with np.errstate(divide="ignore", invalid="ignore"):
            sine = np.where(amplitude > 0.0, need / amplitude, np.inf)
        consistent = np.abs(sine) <= 1.0
        if np.any((amplitude <= 0.0) & (np.abs(need) <= 1e-12 * max(total_w, 1e-30))):
            return 0.0
        if not np.any(consistent):
            continue
        psi_a = np.arcsin(np.clip(sine[consistent], -1.0, 1.0))
        amp = amplitude[consistent]
        for psi in (psi_a, math.pi - psi_a):
            for sign in (1.0, -1.0):
                shown = np.full_like(psi, -np.inf)
                for step, other, sigma in looks:
                    change = amp * np.abs(np.sin(psi + sign * step) - np.sin(psi))
                    shown = np.maximum(shown, (change - other) / sigma)
                least = min(least, float(shown.min()))
    if math.isinf(least):
        return 0.0
    return GRID_SAFETY * least if least > 0.0 else least


GRID_SAFETY = 0.9
