"""A fitted fringe turned into a phase actuator's calibration table, with its quality gate.

What a phase table means (see :mod:`meshwarden.mapping`): value = the gate's phase as the mesh sees
it, in rad, rising strictly with volts from 0 V; a requested phase is taken modulo 2 pi and the
lowest voltage that gives it is used. So the table is

    phase(V) = offset + c w(V^2),   offset = (phi0 - reference) mod 2 pi  in [0, 2 pi)

where phi0 + c w(V^2) is the fitted fringe argument (:mod:`.fringe`) and ``reference_rad`` is
what the fringe adds on top of the gate's own phase: the phase of the light it interferes with and
the combiner's port convention. The runner that set up the interferometer knows it; 0 when the
fringe's argument is the gate's phase itself. Every phase is reachable only if the table spans
2 pi within the hard limit, which is the main check of the gate.

Points start evenly spaced both in phase and in volts, and segments are halved until the mapping's
monotone cubic (PCHIP) through them follows the fitted curve within ``interpolation_tol_rad`` on a
dense grid. The table stops at the lower of the hard limit and the highest volts measured: it
never extrapolates the fit.

Gate: points used, residual against the fringe amplitude, span >= 2 pi within the limit, strict
monotonicity, the largest standard error of the phase along the table (from the fit's full
covariance; the default 0.01 rad keeps two sigma within a 0.02 rad target),
and, when the monitor noise is known, agreement with the model (residual rms within a factor of
the noise: a larger misfit means the model does not describe the actuator).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.interpolate import PchipInterpolator

from meshwarden.calibration import CalibrationTable
from meshwarden.procedures.fringe import FringeFit
from meshwarden.procedures.inputs import ProcedureInputError, non_negative, positive
from meshwarden.procedures.quality import GateResult, gate

TWO_PI = 2.0 * math.pi
MAX_RESIDUAL_FRACTION = 0.05  # the gate's default: fringe fit rms residual over the fringe amplitude


@dataclass(frozen=True)
class PhaseTable:
    """A phase calibration table (volts ascending, phase rad) with its gate verdict."""

    volts: tuple[float, ...]
    phase_rad: tuple[float, ...]
    offset_rad: float
    top_volts: float
    span_rad: float
    status: str
    reason: str
    gate: GateResult

    def to_calibration(self, actuator: str, version: str, note: str = "") -> CalibrationTable:
        """The table as a measured phase calibration; refused when the gate failed."""
        if self.status != "ok":
            raise ProcedureInputError(f"{actuator}: the phase table failed its gate ({self.reason}); not usable")
        return CalibrationTable(actuator, "phase", version, "measured", self.volts, self.phase_rad, note)

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {
            "volts": list(self.volts),
            "phase_rad": list(self.phase_rad),
            "offset_rad": self.offset_rad,
            "top_volts": self.top_volts,
            "span_rad": self.span_rad,
            "status": self.status,
            "reason": self.reason,
            "gate": self.gate.as_dict(),
        }


def volts_for_actuated_phase(fit: FringeFit, actuated_rad: Any) -> np.ndarray:
    """Inverse of the fitted c w(V^2): the volts at which the actuator adds ``actuated_rad`` (>= 0)."""
    actuated = np.asarray(actuated_rad, dtype=float)
    if fit.rate_rad_per_v2 <= 0 or not np.all(np.isfinite(actuated)) or np.any(actuated < 0):
        raise ProcedureInputError("actuated phases must be finite and >= 0, and the fit's rate > 0")
    w = actuated / fit.rate_rad_per_v2
    b = fit.growth_per_v2
    u = w if b < 1e-12 else np.log1p(b * w) / b
    return np.asarray(np.sqrt(np.maximum(u, 0.0)))


def phase_step_volts(fit: FringeFit, start_volts: float, steps: int = 4) -> np.ndarray:
    """Volts giving ``steps`` phases a quarter fringe apart from ``start_volts``, for four-step phase stepping
    (:func:`.fringe.four_step_phase`): a check of a table, or a re-measurement of the offset, in four frames."""
    start = float(fit.actuated_phase(non_negative("start_volts", start_volts)))
    return volts_for_actuated_phase(fit, start + np.arange(steps) * math.pi / 2)


def _table_volts(fit: FringeFit, top: float, span: float, start_points: int, tol: float) -> np.ndarray:
    """Volts of the table: even in phase and in volts, then refined where PCHIP strays from the fit."""
    volts = np.unique(
        np.r_[volts_for_actuated_phase(fit, np.linspace(0.0, span, start_points)), np.linspace(0, top, start_points)]
    )
    volts = volts[volts <= top]
    dense = np.linspace(0.0, top, 4001)
    for _ in range(12):
        error = np.abs(PchipInterpolator(volts, fit.actuated_phase(volts))(dense) - fit.actuated_phase(dense))
        bad = np.unique(np.searchsorted(volts, dense[error > tol]))
        if bad.size == 0:
            break
        bad = bad[(bad > 0) & (bad < volts.size)]
        volts = np.unique(np.r_[volts, 0.5 * (volts[bad - 1] + volts[bad])])
    return volts


def build_phase_table(
    fit: FringeFit,
    *,
    hard_limit_volts: float,
    reference_rad: float = 0.0,
    table_points: int = 16,
    interpolation_tol_rad: float = 1e-3,
    noise_rms: float | None = None,
    min_points: int = 12,
    max_residual_fraction: float = MAX_RESIDUAL_FRACTION,
    needed_span_rad: float = TWO_PI,
    max_phase_se_rad: float = 0.01,
    max_residual_over_noise: float = 2.0,
) -> PhaseTable:
    """The phase table of one actuator from its fringe fit, gated; a failed gate gives status 'failed'.

    ``table_points`` sets the starting grid (that many points even in phase, as many even in volts).
    """
    limit = positive("hard_limit_volts", hard_limit_volts)
    if not math.isfinite(reference_rad):
        raise ProcedureInputError(f"reference_rad must be finite, got {reference_rad}")
    if isinstance(table_points, bool) or not isinstance(table_points, int) or table_points < 2:
        raise ProcedureInputError(f"table_points must be an integer >= 2, got {table_points!r}")
    if fit.rate_rad_per_v2 <= 0:
        raise ProcedureInputError("the fit's phase rate must be > 0 (a fringe that does not move cannot be a table)")
    top = min(limit, fit.max_volts)
    span = float(fit.actuated_phase(top))
    volts = _table_volts(fit, top, span, table_points, positive("interpolation_tol_rad", interpolation_tol_rad))
    offset = (fit.phase0_rad - reference_rad) % TWO_PI
    values = offset + fit.actuated_phase(volts)
    residual_fraction = fit.residual_rms / fit.amplitude if fit.amplitude > 0 else math.inf
    phase_se = float(np.max(fit.phase_se(np.linspace(0.0, top, 200))))
    checks = {
        "points": float(fit.points),
        "residual_fraction": residual_fraction,
        "span_rad": span,
        "top_volts": top,
        "phase_se_max_rad": phase_se,
    }
    failures = []
    if fit.points < min_points:
        failures.append(f"only {fit.points} points (need {min_points})")
    if not residual_fraction <= max_residual_fraction:
        failures.append(f"residual {residual_fraction:.3g} of the fringe amplitude (limit {max_residual_fraction:g})")
    if span < needed_span_rad:
        failures.append(f"reaches {span:.3g} rad by {top:.4g} V (needs {needed_span_rad:.4g} rad within the limit)")
    if not (np.all(np.diff(volts) > 0) and np.all(np.diff(values) > 0)):
        failures.append("table is not strictly monotone")
    if not phase_se <= max_phase_se_rad:
        failures.append(f"phase uncertain to {phase_se:.3g} rad (1 sigma; limit {max_phase_se_rad:g})")
    if noise_rms is not None:
        ratio = fit.residual_rms / positive("noise_rms", noise_rms)
        checks["residual_over_noise"] = ratio
        if ratio > non_negative("max_residual_over_noise", max_residual_over_noise):
            failures.append(f"residual is {ratio:.3g} x the monitor noise: the model does not describe this actuator")
    verdict = gate(checks, failures)
    return PhaseTable(
        volts=tuple(float(v) for v in volts),
        phase_rad=tuple(float(p) for p in values),
        offset_rad=float(offset),
        top_volts=float(top),
        span_rad=span,
        status="ok" if verdict.ok else "failed",
        reason=verdict.reason,
        gate=verdict,
    )
