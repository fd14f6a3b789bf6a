"""Coupling ratio, monotone regression and the coupler table fit."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import isotonic_regression

from meshwarden.calibration import table_from_dict
from meshwarden.mapping import ActuatorMap
from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.coupler_fit import (
    angle_curve,
    balance_weights,
    combined_share,
    coupler_gate,
    coupling_ratio,
    fit_coupler_angle_table,
    fit_coupler_table,
    isotonic_increasing,
    mixed_share_from_swing,
    second_input_share,
    unfold_coupling_angle,
    widest_gap_volts,
)


def _coupler_out(kappa: float) -> tuple[float, float]:
    """Bar and cross powers of a lossless coupler lit at its first port.
    Source: the standard 2x2 coupler matrix [[sqrt(1-k), i sqrt(k)], [i sqrt(k), sqrt(1-k)]]."""
    matrix = np.array([[np.sqrt(1 - kappa), 1j * np.sqrt(kappa)], [1j * np.sqrt(kappa), np.sqrt(1 - kappa)]])
    out = np.abs(matrix @ np.array([1.0, 0.0])) ** 2
    return float(out[0]), float(out[1])


def test_coupling_ratio_of_the_standard_coupler_matrix() -> None:
    """The cross share of a coupler's output is its power coupling kappa, whatever the input power."""
    for kappa in (0.0, 0.13, 0.5, 0.97):
        bar, cross = _coupler_out(kappa)
        assert coupling_ratio([3.0 * bar], [3.0 * cross])[0] == pytest.approx(kappa, abs=1e-12)


def test_isotonic_fit_worked_example() -> None:
    """Pooling the violators of [1, 3, 2, 4] gives [1, 2.5, 2.5, 4] (the PAVA definition; Barlow et al. 1972)."""
    assert isotonic_increasing([1.0, 3.0, 2.0, 4.0]).tolist() == [1.0, 2.5, 2.5, 4.0]


@pytest.mark.parametrize("seed", range(20))
def test_isotonic_fit_matches_scipy_reference(seed: int) -> None:
    """Weighted PAVA equals scipy.optimize.isotonic_regression (an independent implementation) on random data."""
    rng = np.random.default_rng(seed)
    y = np.cumsum(rng.normal(0.1, 1.0, 50))
    w = rng.uniform(0.2, 3.0, 50)
    ref = isotonic_regression(y, weights=w, increasing=True).x
    assert np.allclose(isotonic_increasing(y, w), ref, atol=1e-12)


def _sweep(seed: int, noise: float, top_volts: float = 30.0, points: int = 31):  # type: ignore[no-untyped-def]
    """A coupler whose coupling coefficient grows exponentially as its gap closes with V^2 (stand-in shape)."""
    rng = np.random.default_rng(seed)
    volts = np.linspace(0.0, top_volts, points)
    kappa = np.sin(0.06 * np.exp(3.3 * (volts / 30.0) ** 2)) ** 2
    bar = (1 - kappa) * 1e-3 * (1 + noise * rng.standard_normal(points))
    cross = kappa * 1e-3 + 1e-3 * noise * rng.standard_normal(points)
    return volts, np.clip(bar, 0, None), np.clip(cross, 0, None), kappa


def test_table_follows_a_noisy_coupler_and_is_a_valid_calibration() -> None:
    """The table rises strictly, starts at 0 V, stays within 0.01 of the true kappa and loads as a calibration."""
    volts, bar, cross, kappa = _sweep(1, 0.003)
    fit = fit_coupler_table(volts, bar, cross)
    assert fit.volts[0] == 0.0
    assert all(b > a for a, b in zip(fit.kappa, fit.kappa[1:], strict=False))
    truth = np.sin(0.06 * np.exp(3.3 * (np.array(fit.volts) / 30.0) ** 2)) ** 2
    assert float(np.max(np.abs(np.array(fit.kappa) - truth))) < 0.01
    table = table_from_dict(fit.to_calibration("c00", "v1").as_dict())
    curve = ActuatorMap("c00", "coupler", table, 60.0)
    assert curve.value_at(volts[20]) == pytest.approx(kappa[20], abs=0.01)
    assert fit.residual_rms < 0.01
    assert coupler_gate(fit, needed_low=0.01, needed_high=0.95).ok


def test_sweep_past_full_transfer_is_cut_at_the_top() -> None:
    """Past kappa = 1 the coupling falls again; the table keeps only the rising part."""
    volts, bar, cross, _ = _sweep(2, 0.0, top_volts=36.0, points=37)
    fit = fit_coupler_table(volts, bar, cross)
    assert fit.points == 37
    assert fit.points_used < 37
    assert fit.kappa_high == pytest.approx(float(np.max(cross / (bar + cross))), abs=1e-12)


def test_gate_reports_each_failed_check() -> None:
    """A short, noisy sweep that does not reach high kappa fails on points, range and residual."""
    volts, bar, cross, _ = _sweep(3, 0.05, top_volts=20.0, points=6)
    result = coupler_gate(fit_coupler_table(volts, bar, cross))
    assert not result.ok
    assert "points" in result.reason
    assert "covers kappa" in result.reason
    assert result.checks["points"] == 6.0


@pytest.mark.parametrize(
    ("volts", "bar", "cross", "message"),
    [
        ([0, 1], [1, 0], [0, 0], "no light at point 1"),
        ([0, 1], [1, -1], [0, 1], ">= 0"),
        ([0, 2, 1], [1, 1, 1], [0, 1, 2], "increase strictly"),
        ([0, 1, 2], [1, 1, 1], [1, 1, 1], "does not rise"),
        ([0, 1, 2], [1, 1], [1, 1], "3 points but bar_power has 2"),
    ],
)
def test_bad_sweeps_are_refused(volts: list[float], bar: list[float], cross: list[float], message: str) -> None:
    """Malformed or lightless sweeps raise ProcedureInputError naming the problem."""
    with pytest.raises(ProcedureInputError, match=message):
        fit_coupler_table(volts, bar, cross)


# ---------------------------------------------------------------- the fit in angle space

THETA_FULL_V = 30.0 * np.sqrt(np.log((np.pi / 2) / 0.06) / 3.3)  # where 0.06 exp(3.3 (V/30)^2) = pi/2


def test_unfolded_angle_is_the_coupled_mode_angle_on_both_sides_of_full_transfer() -> None:
    """kappa = sin^2(C L) (Yariv, IEEE JQE 9:919, 1973): a sweep across full transfer unfolds to the
    angle C L itself, rising through pi/2 (up to 2.9 rad here), the top point put on its true side."""
    volts = np.linspace(0.0, 32.5, 20)
    theta = 0.06 * np.exp(3.3 * (volts / 30.0) ** 2)
    unfolded, used = unfold_coupling_angle(np.sin(theta) ** 2, volts)
    assert used == 20
    assert np.allclose(unfolded, theta, atol=1e-9)


def test_unfolding_stops_at_the_next_empty_point() -> None:
    """Past kappa = 0 again (angle pi) the sweep is ambiguous and is not used."""
    volts = np.linspace(0.0, 36.0, 40)
    theta = 0.06 * np.exp(3.3 * (volts / 30.0) ** 2)
    unfolded, used = unfold_coupling_angle(np.sin(theta) ** 2, volts)
    first_past_pi = int(np.flatnonzero(theta > np.pi)[0])
    assert used in (first_past_pi, first_past_pi + 1)
    assert np.all(np.diff(unfolded) > 0)


@pytest.mark.parametrize(("points", "top_volts"), [(14, 36.0), (20, 33.0), (16, 31.5)])
def test_angle_table_finds_full_transfer_between_the_points_and_follows_the_coupler(
    points: int, top_volts: float
) -> None:
    """From a noisy sweep across full transfer (0.3 % noise): the table ends at kappa 1 within 1 % of
    the true full-transfer volts, and kappa read through the daemon's map stays within 0.012 of
    sin^2 of the true angle everywhere below it."""
    volts, bar, cross, _ = _sweep(5, 0.003, top_volts=top_volts, points=points)
    fit = fit_coupler_angle_table(volts, bar, cross)
    assert fit.full_transfer_volts == pytest.approx(THETA_FULL_V, rel=0.01)
    assert fit.kappa_high == 1.0 and fit.volts[-1] == fit.full_transfer_volts
    curve = ActuatorMap("c00", "coupler", table_from_dict(fit.to_calibration("c00", "v1").as_dict()), 60.0)
    probe = np.linspace(0.0, fit.volts[-1], 300)
    truth = np.sin(0.06 * np.exp(3.3 * (probe / 30.0) ** 2)) ** 2
    assert max(abs(curve.value_at(float(v)) - t) for v, t in zip(probe, truth, strict=True)) < 0.012
    assert coupler_gate(fit, needed_low=0.01, needed_high=0.95).ok


def test_angle_table_without_a_turn_ends_at_its_last_point() -> None:
    """A sweep that stops below full transfer keeps its top as measured and says it found none."""
    volts, bar, cross, kappa = _sweep(6, 0.0, top_volts=28.0, points=15)
    fit = fit_coupler_angle_table(volts, bar, cross)
    assert fit.full_transfer_volts is None
    assert fit.volts[-1] == pytest.approx(28.0)
    assert fit.kappa_high == pytest.approx(float(kappa[-1]), abs=1e-9)


@pytest.mark.parametrize("share", [0.0, 0.01, 0.03])
def test_light_in_the_other_input_is_found_and_taken_out(share: float) -> None:
    """A share r of the light in the coupler's other input reads as r + (1 - 2 r) kappa (the
    standard 2x2 coupler matrix applied to both inputs, incoherently); from a noisy sweep across
    full transfer the share is found within 0.004 and the table follows sin^2 of the true angle."""
    rng = np.random.default_rng(2)
    volts = np.r_[np.linspace(0.0, 29.0, 14), [29.5, 29.8, 30.1, 30.6, 31.2]]
    kappa = np.sin(0.06 * np.exp(3.3 * (volts / 30.0) ** 2)) ** 2
    bar = (1 - share) * (1 - kappa) + share * kappa + 0.001 * rng.standard_normal(volts.size)
    cross = (1 - share) * kappa + share * (1 - kappa) + 0.001 * rng.standard_normal(volts.size)
    assert second_input_share(volts, cross / (bar + cross)) == pytest.approx(share, abs=0.004)
    fit = fit_coupler_angle_table(volts, np.clip(bar, 0, None), np.clip(cross, 0, None))
    curve = ActuatorMap("c00", "coupler", table_from_dict(fit.to_calibration("c00", "v1").as_dict()), 60.0)
    probe = np.linspace(0.0, fit.volts[-1], 200)
    truth = np.sin(0.06 * np.exp(3.3 * (probe / 30.0) ** 2)) ** 2
    assert max(abs(curve.value_at(float(v)) - t) for v, t in zip(probe, truth, strict=True)) < 0.012


def _plate_coupler_angle(volts: np.ndarray) -> np.ndarray:
    """Coupling angle of a gap-closing coupler on a parallel-plate actuator, plus a splitting error.
    Source: the plate's stable equilibrium u (1 - u)^2 = (4/27) (V / V_PI)^2, u = x / g0 (Nathanson
    et al., IEEE Trans. Electron Devices 14:117, 1967), the coupling C = C0 exp(-(g - g_ref) / d)
    (Chrostowski & Hochberg, Silicon Photonics Design, 2015; from memory) and theta = C L (Yariv
    1973). Invented demo-sized numbers: V_PI 50 V, g0 3 um, optical gap 700 nm at rest, d 113 nm,
    C L = pi/2 at a 365 nm gap, splitting error -0.03 rad."""
    pull_in_v, gap_nm = 50.0, 3000.0
    travel = []
    for v in volts:
        roots = np.roots([1.0, -2.0, 1.0, -(4.0 / 27.0) * (v / pull_in_v) ** 2])
        travel.append(min(r.real for r in roots if abs(r.imag) < 1e-9 and r.real >= 0) * gap_nm)
    optical_gap = 700.0 - np.array(travel)
    return np.asarray((np.pi / 2) * np.exp(-(optical_gap - 365.0) / 113.0) - 0.03)


def test_angle_curve_passes_through_its_points_and_rises_between_them() -> None:
    """The interpolating curve returns the given angles at the given volts and never falls between."""
    volts = np.array([0.0, 10.0, 20.0, 30.0, 35.0, 38.0])
    theta = _plate_coupler_angle(volts)
    curve = angle_curve(volts, theta)
    assert np.allclose(curve(volts), theta, rtol=1e-12)
    dense = curve(np.linspace(0.0, 38.0, 2000))
    assert np.all(np.diff(dense) >= -1e-15)


def test_angle_table_follows_a_plate_coupler_between_sparse_points() -> None:
    """Noise-free readings at a calibration's sparse points (0 V, two below the first step, seven
    even in kappa, full transfer, three past it) give a table that the daemon's map reads within
    0.002 of sin^2 of the true angle everywhere below full transfer (coupled-mode kappa, Yariv 1973);
    a cubic through (V, theta) with four table points per interval missed by about 0.005."""
    dense = np.linspace(0.0, 45.0, 9001)
    theta = _plate_coupler_angle(dense)
    full = float(dense[np.argmax(theta >= np.pi / 2)])
    rising = dense[dense < full]
    kappa_rising = np.sin(_plate_coupler_angle(rising)) ** 2
    even = [float(rising[np.argmax(kappa_rising >= k)]) for k in np.linspace(0, 1, 9)[1:-1]]
    volts = np.array(sorted({0.0, even[0] * 0.35, even[0] * 0.7, *even, full, full + 1.0, full + 2.0, full + 3.0}))
    kappa = np.sin(_plate_coupler_angle(volts)) ** 2
    fit = fit_coupler_angle_table(volts, 1.0 - kappa, kappa)
    assert fit.full_transfer_volts == pytest.approx(full, abs=0.02)
    curve = ActuatorMap("c00", "coupler", table_from_dict(fit.to_calibration("c00", "v1").as_dict()), 60.0)
    probe = np.linspace(0.0, fit.volts[-1], 400)
    truth = np.sin(np.minimum(_plate_coupler_angle(probe), np.pi / 2)) ** 2
    assert max(abs(curve.value_at(float(v)) - t) for v, t in zip(probe, truth, strict=True)) < 0.002


@pytest.mark.parametrize(
    ("volts", "theta"), [([0.0, 1.0], [0.2]), ([1.0, 0.5], [0.1, 0.2]), ([-1.0, 1.0], [0.1, 0.2]), ([0, 1], [0.2, 0.1])]
)
def test_angle_curve_refuses_bad_points(volts: list[float], theta: list[float]) -> None:
    """Mismatched lengths, falling volts, negative volts or falling angles are refused."""
    with pytest.raises(ProcedureInputError):
        angle_curve(volts, theta)


def _two_inputs_out(kappa: float, share: float, psi: float) -> tuple[float, float]:
    """Bar and cross powers of a lossless coupler with powers 1 - share and share in its two inputs,
    psi apart. Source: the standard 2x2 coupler matrix [[sqrt(1-k), i sqrt(k)], [i sqrt(k), sqrt(1-k)]]."""
    matrix = np.array([[np.sqrt(1 - kappa), 1j * np.sqrt(kappa)], [1j * np.sqrt(kappa), np.sqrt(1 - kappa)]])
    field = np.array([np.sqrt(1 - share), np.sqrt(share) * np.exp(1j * psi)])
    out = np.abs(matrix @ field) ** 2
    return float(out[0]), float(out[1])


@pytest.mark.parametrize(("kappa", "share"), [(0.5, 0.01), (0.3, 0.03), (0.8, 0.002), (0.45, 0.2)])
def test_mixed_share_from_the_swing_of_a_turned_input(kappa: float, share: float) -> None:
    """The cross ratio's swing as the other input's phase turns a full circle (four steps, Creath
    1988) gives back the share of light in that input, and the mean over the circle is the
    incoherent r + (1 - 2 r) kappa (2x2 coupler matrix recomputed with numpy)."""
    ratios = []
    for k in range(4):
        bar, cross = _two_inputs_out(kappa, share, 0.7 + k * np.pi / 2)
        ratios.append(cross / (bar + cross))
    swing = 0.5 * np.hypot(ratios[3] - ratios[1], ratios[0] - ratios[2])
    assert mixed_share_from_swing(kappa, swing) == pytest.approx(share, rel=1e-9)
    assert np.mean(ratios) == pytest.approx(share + (1 - 2 * share) * kappa, abs=1e-12)


def test_shares_in_a_row_combine_as_their_affine_maps() -> None:
    """Two mixings in a row (r1, then r2 on the result) read as one share r with 1 - 2 r the product;
    none is no share; a share of 1/2 or more is refused."""
    kappa, r1, r2 = 0.37, 0.02, 0.05
    once = r1 + (1 - 2 * r1) * kappa
    twice = r2 + (1 - 2 * r2) * once
    r = combined_share([r1, r2])
    assert r + (1 - 2 * r) * kappa == pytest.approx(twice, abs=1e-12)
    assert combined_share([]) == 0.0
    with pytest.raises(ProcedureInputError):
        combined_share([0.5])
    with pytest.raises(ProcedureInputError):
        mixed_share_from_swing(1.0, 0.1)


def test_balance_weights_undo_two_ports_fixed_transmissions() -> None:
    """Bar and cross seen through transmissions 0.9 and 0.7: the weights are their inverses up to a
    common factor, so the balanced ratio is kappa (a lossless coupler conserves power)."""
    kappa = np.linspace(0.02, 0.98, 12)
    weights = balance_weights(0.9 * (1 - kappa), 0.7 * kappa)
    assert weights is not None
    assert weights[0] * 0.9 == pytest.approx(1.0) and weights[1] * 0.7 == pytest.approx(1.0)
    assert balance_weights([0.5, 0.5, 0.5], [0.5, 0.5, 0.5]) is None


def test_a_sweep_short_of_full_transfer_takes_a_known_share_out() -> None:
    """A sweep that never reaches full transfer cannot find the mixed share from the fold; given it,
    the table follows sin^2 of the true angle (Yariv 1973) within 0.002 instead of r off at the bottom;
    a share of 1/2 or more is refused."""
    share = 0.03
    volts = np.linspace(0.0, 28.0, 15)
    kappa = np.sin(0.06 * np.exp(3.3 * (volts / 30.0) ** 2)) ** 2
    bar = (1 - share) * (1 - kappa) + share * kappa
    cross = (1 - share) * kappa + share * (1 - kappa)
    plain = fit_coupler_angle_table(volts, bar, cross)
    assert plain.full_transfer_volts is None and plain.kappa_low == pytest.approx(kappa[0] + share * (1 - 2 * kappa[0]))
    fit = fit_coupler_angle_table(volts, bar, cross, known_share=share)
    curve = ActuatorMap("c00", "coupler", table_from_dict(fit.to_calibration("c00", "v1").as_dict()), 60.0)
    probe = np.linspace(0.0, 28.0, 200)
    truth = np.sin(0.06 * np.exp(3.3 * (probe / 30.0) ** 2)) ** 2
    assert max(abs(curve.value_at(float(v)) - t) for v, t in zip(probe, truth, strict=True)) < 0.002
    with pytest.raises(ProcedureInputError):
        fit_coupler_angle_table(volts, bar, cross, known_share=0.5)


def test_the_widest_step_in_kappa_below_full_transfer_is_split() -> None:
    """Points at kappa 0.01, 0.2, 0.4 and 0.6 with full transfer above them: the widest step (0.6
    to 1 at full transfer) is split at the volts where the table reads its middle, 0.8; with a
    limit of 0.45 nothing is asked for."""
    volts = np.linspace(0.0, 40.0, 81)
    kappa = np.sin(0.05 + 2.0 * (volts / 40.0) ** 3) ** 2  # full transfer near 36.5 V, then down
    fit = fit_coupler_angle_table(volts, 1.0 - kappa, kappa)
    measured = [float(np.interp(k, kappa[: int(np.argmax(kappa)) + 1], volts[: int(np.argmax(kappa)) + 1]))
                for k in (0.01, 0.2, 0.4, 0.6)]  # fmt: skip
    middle = widest_gap_volts(fit, measured, 0.12)
    assert middle is not None
    assert float(np.interp(middle, fit.volts, fit.kappa)) == pytest.approx(0.8, abs=0.005)
    assert widest_gap_volts(fit, measured, 0.45) is None
