"""Multiplexed perturbation designs for scans, and the estimator of per-actuator responses.

A scan moves N actuators by small steps around their operating point and reads every monitor once
per frame. With a design matrix D (frames x actuators, entries -1/0/+1 times the step) the frames
follow y = y0 + D b + noise (linear for small steps), and least squares over X = [1, D] gives the
rest level y0 and the responses b (per monitor). The variance of each response is
sigma^2 [(X^T X)^-1]_jj; :meth:`PerturbationDesign.variance_factors` gives those factors for a
unit step.

* Hadamard (weighing) design: the columns of a Sylvester Hadamard matrix (scipy.linalg.hadamard)
  after the all-ones one; every actuator moves +-step in every frame. H H^T = n I, so each
  response has variance sigma^2 / n from n = N + 1 frames (rounded up to a power of two), against
  sigma^2 from measuring it on its own (Harwit & Sloane, *Hadamard Transform Optics*, 1979).
* S-matrix design: 0/1 masks S = (1 - H')/2, H' a normalised Hadamard matrix of order N + 1
  without its first row and column, N = 2^k - 1, plus one frame at rest. For a known rest level
  each unknown's mean-square error falls by (N + 1)^2 / (4N) against one at a time (Harwit &
  Sloane 1979). Use it where actuators can only be pushed one way from rest.
* One at a time: a rest frame and each actuator stepped alone, for comparison.

The advantage holds for noise that does not grow with the signal (detector and amplifier noise);
for shot-noise-limited monitors it vanishes (Fellgett's multiplex advantage; from memory).

Slow drift is not white noise: a random walk puts most of its power at the lowest frequencies, and
in the natural (Sylvester) order some columns are the slowest Walsh functions (one sign change over
the whole design), so drift lands on those actuators as a response. :func:`drift_robust` takes the
rows in a fixed scrambled order, which leaves every column with a similar, small share of the drift,
and fits ``trend`` Legendre polynomials of the frame index with the responses, which takes the slow
part out; the rest shows in the residuals of the fit like any other noise.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.linalg import hadamard

from meshwarden.procedures.inputs import FloatArray, ProcedureInputError, float_matrix, positive


def _count(actuators: int) -> int:
    if isinstance(actuators, bool) or not isinstance(actuators, int) or actuators < 1:
        raise ProcedureInputError(f"actuators must be an integer >= 1, got {actuators!r}")
    return actuators


@dataclass(frozen=True)
class PerturbationDesign:
    """Step pattern (frames x actuators, entries -1, 0, +1) of one scan design."""

    kind: str
    pattern: tuple[tuple[int, ...], ...]
    trend: int = 0  # Legendre polynomials of the frame index (degrees 1..trend) fitted with the responses

    @property
    def frames(self) -> int:
        """Monitor frames the design takes."""
        return len(self.pattern)

    @property
    def actuators(self) -> int:
        """Actuators the design resolves."""
        return len(self.pattern[0])

    def matrix(self) -> FloatArray:
        """The pattern as a float array."""
        return np.array(self.pattern, dtype=float)

    def regressors(self, step: float = 1.0) -> FloatArray:
        """The least-squares columns: the rest level, the drift terms, then the pattern times ``step``."""
        t = np.linspace(-1.0, 1.0, self.frames) if self.frames > 1 else np.zeros(1)
        trend = [np.polynomial.legendre.Legendre.basis(d)(t) for d in range(1, self.trend + 1)]
        return np.column_stack([np.ones(self.frames), *trend, self.matrix() * step])

    def variance_factors(self) -> FloatArray:
        """Variance of each estimated response over sigma^2, for a unit step (rest level and drift estimated too)."""
        x = self.regressors()
        return np.asarray(np.diag(np.linalg.inv(x.T @ x))[1 + self.trend :])

    @property
    def spare(self) -> int:
        """Degrees of freedom the fit leaves for the residuals."""
        return self.frames - 1 - self.trend - self.actuators

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {
            "kind": self.kind,
            "frames": self.frames,
            "trend": self.trend,
            "pattern": [list(row) for row in self.pattern],
        }


def _design(kind: str, pattern: np.ndarray) -> PerturbationDesign:
    return PerturbationDesign(kind, tuple(tuple(int(v) for v in row) for row in pattern))


def hadamard_design(actuators: int) -> PerturbationDesign:
    """+-1 design for ``actuators`` from the smallest Sylvester Hadamard matrix of order >= actuators + 1."""
    n = 1 << _count(actuators).bit_length()  # smallest power of two > actuators
    return _design("hadamard", hadamard(n)[:, 1 : actuators + 1])


def s_matrix(order: int) -> FloatArray:
    """The N x N S-matrix of 0/1 masks, N = 2^k - 1: S = (1 - H')/2 from the Sylvester Hadamard matrix."""
    if isinstance(order, bool) or not isinstance(order, int) or order < 1 or (order + 1) & order:
        raise ProcedureInputError(f"an S-matrix has order 2^k - 1 (1, 3, 7, 15 ...), got {order!r}")
    return np.asarray((1 - hadamard(order + 1)[1:, 1:]) / 2, dtype=float)


def s_matrix_design(actuators: int) -> PerturbationDesign:
    """A rest frame and the rows of the smallest S-matrix with at least ``actuators`` columns."""
    order = (1 << _count(actuators).bit_length()) - 1
    rows = np.vstack([np.zeros((1, order)), s_matrix(order)])
    return _design("s_matrix", rows[:, :actuators])


def one_at_a_time_design(actuators: int) -> PerturbationDesign:
    """A rest frame, then each actuator stepped alone."""
    return _design("one_at_a_time", np.vstack([np.zeros((1, _count(actuators))), np.eye(actuators)]))


DRIFT_ORDER_SEED = 20261202  # any fixed seed: the order must only be the same in every scan


def drift_robust(design: PerturbationDesign, trend: int = 2) -> PerturbationDesign:
    """The same rows in a fixed scrambled order, fitted with ``trend`` drift polynomials (see the module notes)."""
    if isinstance(trend, bool) or not isinstance(trend, int) or trend < 0:
        raise ProcedureInputError(f"trend must be an integer >= 0, got {trend!r}")
    if design.frames - 1 - trend - design.actuators < 0:
        raise ProcedureInputError(
            f"{design.frames} frames cannot fit {design.actuators} actuators and {trend} drift terms"
        )
    order = np.random.default_rng(DRIFT_ORDER_SEED).permutation(design.frames)
    return PerturbationDesign(design.kind, tuple(design.pattern[i] for i in order), trend)


def scan_design(actuators: int, trend_max: int = 2) -> PerturbationDesign:
    """The S-matrix design for ``actuators`` in drift-robust order, with as many drift terms (up to ``trend_max``)
    as its spare frames allow and the fit stays solvable: in a short design the scrambled rows can make a drift
    polynomial a combination of the step columns (4 frames for 2 actuators), and then one term fewer is fitted."""
    plain = s_matrix_design(actuators)
    for trend in range(min(trend_max, plain.frames - 1 - plain.actuators), -1, -1):
        design = drift_robust(plain, trend)
        x = design.regressors()
        if np.linalg.matrix_rank(x) == x.shape[1]:
            return design
    return plain


def estimate_responses(design: PerturbationDesign, frames: Any, step: float) -> tuple[FloatArray, FloatArray]:
    """(responses per unit step, actuators x monitors; rest level per monitor) from the design's frames.

    ``frames`` holds one row per frame, one column per monitor (a 1-D array is one monitor).
    """
    y = float_matrix("frames", frames)
    if y.shape[0] != design.frames:
        raise ProcedureInputError(f"the {design.kind} design takes {design.frames} frames, got {y.shape[0]}")
    x = design.regressors(positive("step", step))
    coef, *_ = np.linalg.lstsq(x, y, rcond=None)
    return np.asarray(coef[1 + design.trend :]), np.asarray(coef[0])
