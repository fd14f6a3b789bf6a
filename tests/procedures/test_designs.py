"""Hadamard, S-matrix and one-at-a-time scan designs and the response estimator."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import hadamard

from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.designs import (
    drift_robust,
    estimate_responses,
    hadamard_design,
    one_at_a_time_design,
    s_matrix,
    s_matrix_design,
    scan_design,
)


def test_hadamard_design_published_properties() -> None:
    """H H^T = n I and inv(H^T H)[0,0] = 1/8 for n = 8: seven actuators in eight frames, each response with
    variance sigma^2 / 8. Source: Harwit & Sloane, Hadamard Transform Optics (1979); scipy.linalg.hadamard."""
    h = hadamard(8)
    assert np.array_equal(h @ h.T, 8 * np.eye(8))
    assert np.linalg.inv(h.T @ h)[0, 0] == pytest.approx(1 / 8)
    design = hadamard_design(7)
    assert design.frames == 8
    assert np.allclose(design.variance_factors(), 1 / 8)


def test_s_matrix_published_gain() -> None:
    """For N = 7 the S-matrix lowers each unknown's mean-square error by (N+1)^2 / (4N) = 2.2857 against one at
    a time. Source: Harwit & Sloane, Hadamard Transform Optics (1979)."""
    s = s_matrix(7)
    assert set(np.unique(s)) == {0.0, 1.0}
    gain = 1.0 / np.mean(np.diag(np.linalg.inv(s.T @ s)))
    assert gain == pytest.approx(2.2857, abs=1e-4)
    # Its inverse in closed form, S^-1 = 2/(N+1) (2 S^T - J) (Harwit & Sloane 1979; from memory).
    assert np.allclose(s @ (2 / 8 * (2 * s.T - np.ones((7, 7)))), np.eye(7))


@pytest.mark.parametrize("make", [hadamard_design, s_matrix_design, one_at_a_time_design])
def test_estimator_recovers_responses_of_a_linear_chip(make) -> None:  # type: ignore[no-untyped-def]
    """Noise-free frames y = y0 + (step x pattern) R give back R and y0 exactly, for several monitors at once."""
    rng = np.random.default_rng(4)
    design = make(11)
    responses = rng.normal(size=(11, 3))
    rest = rng.normal(size=3)
    frames = rest + 0.05 * design.matrix() @ responses
    got, got_rest = estimate_responses(design, frames, 0.05)
    assert np.allclose(got, responses, atol=1e-10)
    assert np.allclose(got_rest, rest, atol=1e-12)


@pytest.mark.parametrize(
    "make", [hadamard_design, s_matrix_design, one_at_a_time_design, lambda n: drift_robust(s_matrix_design(n - 2), 2)]
)
def test_variance_factors_match_monte_carlo(make) -> None:  # type: ignore[no-untyped-def]
    """The stated variance of each response matches 4000 simulated noisy scans within 10 % (reference: Monte Carlo)."""
    rng = np.random.default_rng(9)
    design = make(7)
    noise = rng.normal(size=(4000, design.frames))
    estimates = np.array([estimate_responses(design, row, 1.0)[0][:, 0] for row in noise])
    assert np.allclose(estimates.var(axis=0), design.variance_factors(), rtol=0.1)


def test_multiplexing_takes_about_one_frame_per_actuator() -> None:
    """60 actuators cost 64 frames with either multiplexed design (N + 1 rounded to a power of two)."""
    assert hadamard_design(60).frames == 64
    assert s_matrix_design(60).frames == 64
    assert one_at_a_time_design(60).frames == 61


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: s_matrix(6), "2\\^k - 1"),
        (lambda: hadamard_design(0), "actuators"),
        (lambda: estimate_responses(hadamard_design(3), np.zeros(5), 0.1), "takes 4 frames, got 5"),
        (lambda: estimate_responses(hadamard_design(3), np.zeros(4), 0.0), "step"),
        (lambda: estimate_responses(hadamard_design(3), [1, 2, np.nan, 4], 0.1), "finite"),
    ],
)
def test_bad_design_inputs_are_refused(call: object, message: str) -> None:
    """Each bad input raises ProcedureInputError with a specific message."""
    with pytest.raises(ProcedureInputError, match=message):
        call()  # type: ignore[operator]


def test_drift_terms_take_a_slow_drift_out_of_the_responses() -> None:
    """Frames that drift along a quadratic in time give back the true responses exactly with two drift terms (the
    drift lies in the span of the fit: least squares reproduces any model in its span), while the natural S-matrix
    order puts most of a straight drift on its slowest column, whose pattern has one change of sign (Walsh
    functions of Sylvester's order; scipy.linalg.hadamard)."""
    rng = np.random.default_rng(12)
    plain = s_matrix_design(35)
    robust = drift_robust(plain, 2)
    responses = rng.normal(size=(35, 2)) * 1e-3
    for design in (plain, robust):
        t = np.arange(design.frames, dtype=float)
        drift = np.column_stack([0.05 * t, 0.03 * t - 2e-4 * t**2])
        frames = 1.0 + design.matrix() @ responses + drift
        got, _ = estimate_responses(design, frames, 1.0)
        if design is robust:
            assert np.allclose(got, responses, atol=1e-9)
        else:
            changes = np.abs(np.diff(plain.matrix(), axis=0)).sum(axis=0)
            slowest = int(np.argmin(changes))
            assert changes[slowest] == 1
            errors = np.abs(got - responses).max(axis=1)
            assert int(np.argmax(errors)) == slowest
            assert errors[slowest] > 100 * np.abs(responses).max()
    assert sorted(robust.pattern) == sorted(plain.pattern)  # the same frames, in another order


def test_drift_robust_refuses_more_terms_than_spare_frames() -> None:
    """Seven actuators in eight frames leave no room for a drift term: a clear error, not a singular fit."""
    with pytest.raises(ProcedureInputError, match="cannot fit"):
        drift_robust(s_matrix_design(7), 1)


@pytest.mark.parametrize("actuators", range(1, 40))
def test_scan_design_is_always_solvable(actuators: int) -> None:
    """The scan's design for any number of actuators leaves every response estimable (a full-rank fit) and recovers
    known responses exactly from noiseless frames, with as many drift terms as a solvable fit allows."""
    design = scan_design(actuators)
    x = design.regressors()
    # Source: a linear least-squares problem has a unique solution iff its matrix has full column rank (standard;
    # rank by numpy's SVD)
    assert np.linalg.matrix_rank(x) == x.shape[1]
    assert sorted(design.pattern) == sorted(s_matrix_design(actuators).pattern)
    rng = np.random.default_rng(actuators)
    truth = rng.normal(size=(actuators, 3))
    frames = 2.0 + design.matrix() @ truth
    got, rest = estimate_responses(design, frames, 1.0)
    np.testing.assert_allclose(got, truth, atol=1e-9)
    np.testing.assert_allclose(rest, 2.0, atol=1e-9)
    room = min(2, design.frames - 1 - actuators)
    if design.trend < room:  # a drift term was dropped only where it made the fit singular
        more = drift_robust(s_matrix_design(actuators), design.trend + 1).regressors()
        assert np.linalg.matrix_rank(more) < more.shape[1]
