"""Fit of the power fringe of an electrostatic phase actuator, and four-step phase stepping.

Model. A phase actuator between two arms of an interferometer gives a monitor power

    P(V) = A + B cos(phi0 + c w(u)),   u = V^2,   w(u) = (exp(b u) - 1) / b   (w = u when b = 0)

A comb drive moves in proportion to V^2 (Tang, Nguyen & Howe, Sens. Actuators 20:25, 1989), so
near rest the actuated phase is c u; the fit form is common practice. A beam approaching a
waveguide raises the effective index roughly exponentially with the closing gap, so over a long
sweep the phase grows faster than u; ``growth_per_v2`` (b >= 0) carries that, and b = 0 is the
plain model. ``rate_rad_per_v2`` (c) is the phase slope d phi / du at rest.

Convention: c > 0 (more volts, more phase) and B >= 0; the fringe alone cannot tell the sign of
the phase, the physics does. phi0 is reported in [0, 2 pi).

Method. For each b on a grid, the model is linear in (A, B cos phi0, -B sin phi0) once c is fixed;
a grid over c finer than a quarter fringe across the sweep and below the sampling limit gives the
seed with the least squared residual; scipy's trust-region least squares then refines all
parameters together. Standard errors are sqrt(diag(s^2 (J^T J)^-1)), s^2 = SSR / (n - p).

Four-step phase stepping: samples I_k at phase phi + k pi/2 give phi = atan2(I3 - I1, I0 - I2)
(Creath, Prog. Optics 26, 1988; Hariharan et al., Appl. Opt. 26:2504, 1987).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy.optimize import least_squares

from meshwarden.procedures.inputs import FloatArray, ProcedureInputError, float_vector, same_length
from meshwarden.procedures.quality import GateResult, gate, plain_dict

TWO_PI = 2.0 * math.pi
_GROWTH_GRID = (0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0)  # b u_max: exp(7) ~ 1100x slope


def warp(u: FloatArray, growth: float) -> FloatArray:
    """w(u) = (exp(b u) - 1) / b, tending to u as b -> 0."""
    if abs(growth) < 1e-9:
        return np.asarray(u + 0.5 * growth * u * u)
    return np.asarray(np.expm1(growth * u) / growth)


def fringe_power(
    volts: Any,
    *,
    offset: float,
    amplitude: float,
    rate_rad_per_v2: float,
    phase0_rad: float,
    growth_per_v2: float,
    offset_slope_per_rad: float = 0.0,
    amplitude_slope_per_rad: float = 0.0,
) -> FloatArray:
    """The model P(V) = A + D phi + B (1 + L phi) cos(phi0 + phi), phi = c w(V^2), at ``volts``
    (the module docstring's symbols; D and L are 0 without the arm's loss)."""
    u = np.asarray(volts, dtype=float) ** 2
    phi = rate_rad_per_v2 * warp(u, growth_per_v2)
    swing = amplitude * (1.0 + amplitude_slope_per_rad * phi) * np.cos(phase0_rad + phi)
    return np.asarray(offset + offset_slope_per_rad * phi + swing)


def _warp_dgrowth(u: FloatArray, growth: float) -> FloatArray:
    """d w / d b."""
    if abs(growth) < 1e-6:
        return np.asarray(u * u / 2.0 + growth * u**3 / 3.0)
    return np.asarray((u * growth * np.exp(growth * u) - np.expm1(growth * u)) / growth**2)


@dataclass(frozen=True)
class FringeFit:
    """Fitted fringe of one phase actuator; powers in the unit of the data given (W or A)."""

    offset: float
    amplitude: float
    rate_rad_per_v2: float
    phase0_rad: float
    growth_per_v2: float
    offset_se: float
    amplitude_se: float
    rate_se: float
    phase0_se: float
    growth_se: float
    residual_rms: float
    points: int
    max_volts: float
    cycles: float
    covariance: tuple[tuple[float, ...], ...]
    offset_slope_per_rad: float = 0.0  # D: the offset's change per rad of actuated phase (arm loss)
    amplitude_slope_per_rad: float = 0.0  # L: the amplitude's relative change per rad (arm loss)

    def phase_se(self, volts: Any) -> FloatArray:
        """Standard error of the fringe argument phi0 + c w(V^2), from the full covariance
        (parameters A, B, c, phi0, then b if fitted, then D and L if fitted)."""
        u = np.asarray(volts, dtype=float) ** 2
        grad = [np.zeros_like(u), np.zeros_like(u), warp(u, self.growth_per_v2), np.ones_like(u)]
        if len(self.covariance) in (5, 7):
            grad.append(self.rate_rad_per_v2 * _warp_dgrowth(u, self.growth_per_v2))
        if len(self.covariance) in (6, 7):
            grad += [np.zeros_like(u), np.zeros_like(u)]
        g = np.stack(grad, axis=-1)
        return np.asarray(np.sqrt(np.einsum("...i,ij,...j->...", g, np.array(self.covariance), g)))

    def actuated_phase(self, volts: Any) -> FloatArray:
        """Phase added by ``volts`` relative to 0 V, in rad: c w(V^2)."""
        u = np.asarray(volts, dtype=float) ** 2
        return np.asarray(self.rate_rad_per_v2 * warp(u, self.growth_per_v2))

    def power_at(self, volts: Any) -> FloatArray:
        """Model power at ``volts``."""
        return fringe_power(volts, **self.model())

    def model(self) -> dict[str, float]:
        """The fitted parameters :func:`fringe_power` takes (what a plot needs to redraw the curve)."""
        return {
            "offset": self.offset,
            "amplitude": self.amplitude,
            "rate_rad_per_v2": self.rate_rad_per_v2,
            "phase0_rad": self.phase0_rad,
            "growth_per_v2": self.growth_per_v2,
            "offset_slope_per_rad": self.offset_slope_per_rad,
            "amplitude_slope_per_rad": self.amplitude_slope_per_rad,
        }

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return plain_dict(asdict(self))


def _linear_seed(s: FloatArray, power: FloatArray, growth: float) -> tuple[float, FloatArray]:
    """Best (SSR, [A, B, c, phi0]) over a grid of c for a fixed growth, in scaled units s = u/u_max."""
    w = warp(s, growth)
    span = float(w.max() - w.min())
    step = float(np.max(np.diff(np.sort(w))))
    if span <= 0 or step <= 0:
        raise ProcedureInputError("volts must span more than one value")
    rates = np.arange(TWO_PI / (4 * span), math.pi / step, math.pi / (4 * span))
    if rates.size == 0:
        rates = np.array([TWO_PI / (4 * span)])
    arg = rates[:, None] * w[None, :]
    design = np.stack([np.ones_like(arg), np.cos(arg), np.sin(arg)], axis=2)
    normal = np.einsum("kni,knj->kij", design, design) + 1e-12 * np.eye(3)
    rhs = np.einsum("kni,n->ki", design, power)
    coef = np.linalg.solve(normal, rhs[:, :, None])[:, :, 0]
    ssr = float(power @ power) - np.einsum("ki,ki->k", coef, rhs)
    best = int(np.argmin(ssr))
    a, beta1, beta2 = coef[best]
    return float(ssr[best]), np.array([a, math.hypot(beta1, beta2), rates[best], math.atan2(-beta2, beta1)])


def fit_fringe(volts: Any, power: Any, *, with_growth: bool = False, with_loss: bool = False) -> FringeFit:
    """Fit P = A + B cos(phi0 + c w(V^2)) to a sweep; ``with_growth`` also fits b (else b = 0).

    ``with_loss`` also fits the arm's loss growing with its phase (a MEMS shifter's loss rises as
    its beam approaches the waveguide): the arm's field (1 - l phi) gives, to first order in l,
    P = A + D phi + B (1 + L phi) cos(phi0 + phi) (two-beam interference, I = I1 + I2 + 2
    sqrt(I1 I2) cos phi; Saleh & Teich, *Fundamentals of Photonics*, Wiley 1991, ch. 2), with
    L = -l and D = -2 l I2 (I2 unknown: a free slope). Without them such a loss leaves a
    systematic residual that the standard errors read as uncertainty."""
    v = float_vector("volts", volts, min_length=(7 if with_growth else 6) + (2 if with_loss else 0))
    p = float_vector("power", power)
    same_length("volts", v, "power", p)
    if np.any(v < 0):
        raise ProcedureInputError("volts must be >= 0 (a phase actuator is driven with one polarity)")
    u_max = float(np.max(v * v))
    if u_max <= 0 or np.unique(v).size < 4:
        raise ProcedureInputError("volts must hold at least four distinct values above 0 V")
    s = v * v / u_max
    # Work in units of the data's size: the solver's tolerances are absolute, and powers in W are ~1e-3.
    unit = float(np.max(np.abs(p))) or 1.0
    p = p / unit
    grid = _GROWTH_GRID if with_growth else (0.0,)
    seeds = [(*_linear_seed(s, p, g), g) for g in grid]
    _, start, growth0 = min(seeds, key=lambda item: item[0])

    first_loss = 5 if with_growth else 4  # index of D (then L) in x

    def slopes(x: FloatArray) -> tuple[float, float]:
        return (float(x[first_loss]), float(x[first_loss + 1])) if with_loss else (0.0, 0.0)

    def model(x: FloatArray) -> tuple[FloatArray, FloatArray]:
        growth = x[4] if with_growth else 0.0
        w = warp(s, growth)
        theta = x[3] + x[2] * w
        d, l_ = slopes(x)
        phi = x[2] * w
        return x[0] + d * phi + x[1] * (1.0 + l_ * phi) * np.cos(theta) - p, theta

    def residual(x: FloatArray) -> FloatArray:
        return model(x)[0]

    def jacobian(x: FloatArray) -> FloatArray:
        growth = x[4] if with_growth else 0.0
        _, theta = model(x)
        d, l_ = slopes(x)
        w = warp(s, growth)
        phi = x[2] * w
        sin_t, cos_t = np.sin(theta), np.cos(theta)
        # d model / d phi (phi = c w moves both the argument and the loss terms)
        along = d + x[1] * l_ * cos_t - x[1] * (1.0 + l_ * phi) * sin_t
        cols = [np.ones_like(s), (1.0 + l_ * phi) * cos_t, along * w, -x[1] * (1.0 + l_ * phi) * sin_t]
        if with_growth:
            cols.append(along * x[2] * _warp_dgrowth(s, growth))
        if with_loss:
            cols += [phi, x[1] * phi * cos_t]
        return np.stack(cols, axis=1)

    x0 = np.append(start, growth0) if with_growth else start
    lower = [-np.inf, 0.0, 0.0, -np.inf] + ([0.0] if with_growth else [])
    if with_loss:
        x0 = np.append(x0, [0.0, 0.0])
        lower += [-np.inf, -np.inf]
    x0 = np.maximum(x0, np.array(lower) + 1e-12 * np.isfinite(lower))
    result = least_squares(residual, x0, jac=jacobian, bounds=(lower, np.inf), method="trf", x_scale="jac")
    x = np.asarray(result.x, dtype=float)
    n, k = p.size, x.size
    ssr = float(np.sum(result.fun**2))
    jac = jacobian(x)
    try:
        cov = np.linalg.inv(jac.T @ jac) * ssr / max(n - k, 1)
    except np.linalg.LinAlgError:
        cov = np.full((k, k), np.inf)
    to_data_units = np.array([unit, unit, 1.0 / u_max, 1.0] + ([1.0 / u_max] if with_growth else []))
    if with_loss:
        to_data_units = np.append(to_data_units, [unit, 1.0])
    cov = cov * np.outer(to_data_units, to_data_units)
    se = np.sqrt(np.abs(np.diag(cov)))
    growth = float(x[4]) if with_growth else 0.0
    return FringeFit(
        offset=float(x[0]) * unit,
        amplitude=float(x[1]) * unit,
        rate_rad_per_v2=float(x[2]) / u_max,
        phase0_rad=float(x[3]) % TWO_PI,
        growth_per_v2=growth / u_max,
        offset_se=float(se[0]),
        amplitude_se=float(se[1]),
        rate_se=float(se[2]),
        phase0_se=float(se[3]),
        growth_se=float(se[4]) if with_growth else 0.0,
        residual_rms=math.sqrt(ssr / n) * unit,
        points=n,
        max_volts=float(v.max()),
        cycles=float(x[2] * warp(np.array([1.0]), growth)[0]) / TWO_PI,
        covariance=tuple(tuple(float(c) for c in row) for row in cov),
        offset_slope_per_rad=slopes(x)[0] * unit,
        amplitude_slope_per_rad=slopes(x)[1],
    )


def fringe_verdict(
    fit: FringeFit,
    *,
    min_points: int = 12,
    max_residual_fraction: float = 0.05,
    min_contrast: float = 0.2,
    min_cycles: float = 0.5,
    max_rate_rel_error: float = 0.05,
) -> GateResult:
    """Whether a fringe fit is good enough to build a table from, with the numbers checked.

    residual_fraction = residual rms / B (the misfit against the fringe's own size);
    contrast = B / |A| (fringe visibility); cycles = fringes covered by the sweep (less than
    about half a fringe leaves c and phi0 entangled); rate_rel_error = se(c) / c.
    """
    residual_fraction = fit.residual_rms / fit.amplitude if fit.amplitude > 0 else math.inf
    contrast = fit.amplitude / abs(fit.offset) if fit.offset != 0 else math.inf
    rate_rel = fit.rate_se / fit.rate_rad_per_v2 if fit.rate_rad_per_v2 > 0 else math.inf
    checks = {
        "points": float(fit.points),
        "residual_fraction": residual_fraction,
        "contrast": contrast,
        "cycles": fit.cycles,
        "rate_rel_error": rate_rel,
    }
    failures = []
    if fit.points < min_points:
        failures.append(f"only {fit.points} points (need {min_points})")
    if not residual_fraction <= max_residual_fraction:
        failures.append(f"residual {residual_fraction:.3g} of the fringe amplitude (limit {max_residual_fraction:g})")
    if not contrast >= min_contrast:
        failures.append(f"fringe contrast {contrast:.3g} (need {min_contrast:g})")
    if not fit.cycles >= min_cycles:
        failures.append(f"sweep covers {fit.cycles:.3g} fringes (need {min_cycles:g})")
    if not rate_rel <= max_rate_rel_error:
        failures.append(f"phase rate uncertain to {rate_rel:.3g} (limit {max_rate_rel_error:g})")
    return gate(checks, failures)


@dataclass(frozen=True)
class FourStep:
    """Phase, mean level and modulation amplitude from four samples a quarter fringe apart."""

    phase_rad: float
    offset: float
    amplitude: float

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return plain_dict(asdict(self))


def four_step_phase(samples: Sequence[float]) -> FourStep:
    """phi = atan2(I3 - I1, I0 - I2) for I_k = A + B cos(phi + k pi/2), phi in (-pi, pi]."""
    i = float_vector("samples", samples)
    if i.size != 4:
        raise ProcedureInputError(f"four-step phase stepping takes exactly four samples, got {i.size}")
    sine, cosine = i[3] - i[1], i[0] - i[2]
    return FourStep(
        phase_rad=math.atan2(sine, cosine),
        offset=float(i.mean()),
        amplitude=0.5 * math.hypot(sine, cosine),
    )
