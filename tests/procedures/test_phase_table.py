"""Phase tables built from fringe fits, checked through the mapping layer and an interferometer model."""

from __future__ import annotations

import math

import numpy as np
import pytest

from meshwarden.calibration import table_from_dict
from meshwarden.mapping import ActuatorMap
from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.fringe import fit_fringe, four_step_phase
from meshwarden.procedures.phase_table import build_phase_table, phase_step_volts

STATIC_RAD = 4.1  # the arm's unknown fabrication phase, as the mesh sees it at 0 V
REF_RAD = 0.6  # phase of the light the arm meets at the combiner
A_RAD, B_PER_V2 = 0.14, 2.5e-3  # actuated phase a (exp(b V^2) - 1): evanescent index rise, gap closing as V^2


def _arm_phase(volts: np.ndarray) -> np.ndarray:
    return STATIC_RAD + A_RAD * np.expm1(B_PER_V2 * volts**2)


def _combiner_power(volts: np.ndarray, noise: float, seed: int) -> np.ndarray:
    """Top output of a 50:50 coupler fed by the arm and the reference light, each carrying half the power.
    Source: the standard 2x2 coupler matrix [[sqrt(1-k), i sqrt(k)], [i sqrt(k), sqrt(1-k)]] with k = 1/2."""
    matrix = np.array([[1.0, 1j], [1j, 1.0]]) / math.sqrt(2)
    fields = np.stack([np.exp(1j * _arm_phase(volts)), np.full(volts.size, np.exp(1j * REF_RAD))]) / math.sqrt(2)
    power = np.abs((matrix @ fields)[0]) ** 2
    return power + noise * np.random.default_rng(seed).standard_normal(volts.size)


def test_table_reproduces_the_arm_phase_for_random_requests() -> None:
    """Requested phases mapped to volts through the table give the true arm phase within 0.02 rad (mod 2 pi)."""
    volts = np.linspace(0.0, 44.0, 40)
    fit = fit_fringe(volts, _combiner_power(volts, 0.002, 1), with_growth=True)
    # At this port |t a + i sqrt(k) b|^2 = (1 + cos(arm - REF - pi/2)) / 2: the fringe argument is the arm
    # phase plus reference_rad = -(REF + pi/2).
    table = build_phase_table(fit, hard_limit_volts=50.0, reference_rad=-(REF_RAD + math.pi / 2), noise_rms=0.002)
    assert table.status == "ok", table.reason
    assert 0.0 <= table.offset_rad < 2 * math.pi
    curve = ActuatorMap("p00", "phase", table_from_dict(table.to_calibration("p00", "v1").as_dict()), 50.0)
    for wanted in np.random.default_rng(2).uniform(-10.0, 10.0, 200):
        got = float(_arm_phase(np.array([curve.volts_for(float(wanted))]))[0])
        assert abs((got - wanted + math.pi) % (2 * math.pi) - math.pi) < 0.02


def test_table_stops_at_the_hard_limit_and_fails_without_two_pi() -> None:
    """A limit below the 2 pi point gives a failed table whose reason says how far it reaches."""
    volts = np.linspace(0.0, 44.0, 40)
    fit = fit_fringe(volts, _combiner_power(volts, 0.003, 3), with_growth=True)
    table = build_phase_table(fit, hard_limit_volts=30.0)
    assert table.top_volts == 30.0
    assert table.volts[-1] == 30.0
    assert table.status == "failed"
    assert "needs 6.283 rad within the limit" in table.reason
    with pytest.raises(ProcedureInputError, match="failed its gate"):
        table.to_calibration("p00", "v1")


def test_a_model_that_misses_the_data_fails_agreement() -> None:
    """Fitting the plain c V^2 model to a strongly chirped fringe leaves a residual far above the noise."""
    volts = np.linspace(0.0, 44.0, 40)
    fit = fit_fringe(volts, _combiner_power(volts, 0.003, 4), with_growth=False)
    table = build_phase_table(fit, hard_limit_volts=50.0, noise_rms=0.003)
    assert table.status == "failed"
    assert "model does not describe" in table.reason
    assert table.gate.checks["residual_over_noise"] > 2.0


def test_table_is_strictly_monotone_from_zero_volts() -> None:
    """Volts start at 0 and rise strictly; phases rise strictly from the offset."""
    volts = np.linspace(0.0, 44.0, 40)
    table = build_phase_table(
        fit_fringe(volts, _combiner_power(volts, 0.0, 5), with_growth=True), hard_limit_volts=50.0
    )
    assert table.volts[0] == 0.0
    assert table.phase_rad[0] == pytest.approx(table.offset_rad)
    assert all(b > a for a, b in zip(table.volts, table.volts[1:], strict=False))
    assert all(b > a for a, b in zip(table.phase_rad, table.phase_rad[1:], strict=False))


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"hard_limit_volts": 0.0}, "hard_limit_volts"),
        ({"hard_limit_volts": 50.0, "table_points": 1}, "table_points"),
        ({"hard_limit_volts": 50.0, "reference_rad": math.inf}, "reference_rad"),
        ({"hard_limit_volts": 50.0, "noise_rms": -1.0}, "noise_rms"),
    ],
)
def test_bad_arguments_are_refused(kwargs: dict[str, float], message: str) -> None:
    """Bad table arguments raise ProcedureInputError naming the argument."""
    volts = np.linspace(0.0, 44.0, 40)
    fit = fit_fringe(volts, _combiner_power(volts, 0.0, 6), with_growth=True)
    with pytest.raises(ProcedureInputError, match=message):
        build_phase_table(fit, **kwargs)  # type: ignore[arg-type]


def test_phase_step_volts_give_a_true_four_step_reading() -> None:
    """Volts a quarter fringe apart from 20 V, read at the combiner and put through atan2(I3 - I1, I0 - I2), give the
    true fringe argument arm(20 V) - REF - pi/2 within 0.01 rad (Creath 1988 for the four-step formula)."""
    volts = np.linspace(0.0, 44.0, 40)
    fit = fit_fringe(volts, _combiner_power(volts, 0.001, 7), with_growth=True)
    steps = phase_step_volts(fit, 20.0)
    assert steps[0] == pytest.approx(20.0)
    reading = four_step_phase(list(_combiner_power(steps, 0.0, 0)))
    truth = float(_arm_phase(np.array([20.0]))[0]) - REF_RAD - math.pi / 2
    assert abs((reading.phase_rad - truth + math.pi) % (2 * math.pi) - math.pi) < 0.01
    with pytest.raises(ProcedureInputError, match="start_volts"):
        phase_step_volts(fit, -1.0)


def test_passing_tables_meet_the_phase_target_from_sixteen_frames() -> None:
    """Sixteen points spaced by the nominal curve over a 5 % device spread, at 0.4 % noise: most tables pass the
    gate, and at least 95 % of those that pass stay within 0.02 rad of the true phase everywhere (the gate's
    one-sigma limit of 0.01 rad is honest; truth from the generating model)."""
    # The demo comb: a0 = 2 pi dn_contact L exp(-gap/l) / lambda, b0 = n eps0 t / (g k l), from config/demo values.
    a0, b0 = 0.1387, 2.53e-3
    passed = wrong = 0
    for seed in range(100):
        rng = np.random.default_rng(seed)
        a, b = a0 * (1 + 0.05 * rng.standard_normal()), b0 * (1 + 0.05 * rng.standard_normal())
        static = rng.uniform(0, 2 * math.pi)
        volts = np.sqrt(np.log1p(np.linspace(0, 3 * math.pi, 16) / a0) / b0)
        power = 0.5 * (1 + np.cos(static + a * np.expm1(b * volts**2))) + 0.002 * rng.standard_normal(16)
        fit = fit_fringe(volts, power, with_growth=True)
        table = build_phase_table(fit, hard_limit_volts=50.0, noise_rms=0.002)
        if table.status != "ok":
            continue
        passed += 1
        grid = np.linspace(0.0, table.top_volts, 400)
        error = fit.phase0_rad + fit.actuated_phase(grid) - (static + a * np.expm1(b * grid**2))
        wrong += float(np.max(np.abs((error + math.pi) % (2 * math.pi) - math.pi))) > 0.02
    assert passed >= 80
    assert wrong <= 0.05 * passed
