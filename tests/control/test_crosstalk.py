"""Crosstalk between neighbouring actuators: the shares, the drive that cancels them, their storage,
and the calibration measuring them on a bench whose simulator has within-gate crosstalk."""

from __future__ import annotations

import asyncio
from collections.abc import Callable

import numpy as np
import pytest

from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import Config
from meshwarden.crosstalk import CrosstalkShares, share_from_shift
from meshwarden.errors import CalibrationError
from meshwarden.procedures.calibrate_run import calibration_job
from meshwarden.writelog import check_board_log
from tests.control.conftest import run

Bench = Callable[..., tuple[Config, str]]


def test_share_is_the_extra_squared_drive_per_squared_neighbour_volt() -> None:
    """Electrostatic force goes as V^2 and superposes (Senturia, Microsystem Design, ch. 6): a
    neighbour at 40 V that moves an actuator held at 30 V to where 30.2 V would put it adds
    30.2^2 - 30^2 = 12.04 V^2, a share of 12.04 / 1600 = 0.0075250."""
    assert share_from_shift(30.0, 30.2, 40.0) == pytest.approx(0.007525, rel=1e-9)
    with pytest.raises(ValueError, match="driven"):
        share_from_shift(30.0, 30.2, 0.0)


def test_drive_cancels_the_shares_under_the_superposition_model() -> None:
    """For random shares and targets, the solved drives put back into V_eq^2 = V^2 + sum s V_j^2
    (the superposition, computed here independently with numpy) give every target V_eq."""
    rng = np.random.default_rng(11)
    names = [f"a{i}" for i in range(6)]
    shares = {n: {m: float(rng.uniform(0, 0.03)) for m in names if m != n and rng.random() < 0.5} for n in names}
    model = CrosstalkShares(shares)
    targets = {n: float(rng.uniform(20, 40)) for n in names[:4]}
    held = {"a4": 35.0, "a5": 12.0}
    drive = model.drive_volts(targets, held)
    volts = np.array([drive.get(n, held.get(n, 0.0)) for n in names])
    matrix = np.array([[shares.get(n, {}).get(m, 0.0) for m in names] for n in names])
    equivalent = np.sqrt(volts**2 + matrix @ volts**2)
    for i, n in enumerate(names[:4]):
        assert equivalent[i] == pytest.approx(targets[n], rel=1e-9)


def test_a_neighbour_that_alone_overshoots_gets_zero_volts_and_the_rest_are_solved_again() -> None:
    """If the neighbours alone give more than the target, the actuator gets 0 V (no negative V^2)
    and the others' drives are solved with it at 0."""
    model = CrosstalkShares({"a": {"b": 0.1}, "c": {"a": 0.05}})
    drive = model.drive_volts({"a": 3.0, "c": 20.0}, {"b": 40.0})
    assert drive["a"] == 0.0
    assert drive["c"] == pytest.approx(20.0, rel=1e-12)  # a at 0 V adds nothing to c


def test_stored_shares_are_checked_against_the_chip() -> None:
    """A manifest's crosstalk naming an unknown actuator, itself, a non-number or a share outside
    0..0.5 is refused with the version named; a valid one round-trips."""
    chip = {"c0", "p0"}
    good = CrosstalkShares.from_data({"c0": {"p0": 0.02}}, chip, "v1")
    assert good.as_data() == {"c0": {"p0": 0.02}} and bool(good)
    for bad, words in [
        ({"c9": {"p0": 0.02}}, "not an actuator"),
        ({"c0": {"c0": 0.02}}, "not another actuator"),
        ({"c0": {"p0": "x"}}, "not a number"),
        ({"c0": {"p0": 0.7}}, "outside 0 to 0.5"),
        ([1, 2], "must be a mapping"),
    ]:
        with pytest.raises(CalibrationError, match=words):
            CrosstalkShares.from_data(bad, chip, "v1")


def test_calibration_measures_the_within_gate_share_and_the_daemon_cancels_it(make_bench: Bench) -> None:
    """Bench with a within-gate crosstalk share of 0.02 in the simulator: the calibration measures
    the share of p1 on c1 within 15 % of it (the simulator's own configured value, its truth); with
    the version active, c1 asked for kappa 0.5 while p1 is at 40 V lands within 0.01 of 0.5 (the
    uncorrected drive would be off by the neighbour's 32 V^2); the boards' writes keep the rules."""
    config, name = make_bench(within_gate=0.02)

    async def scenario() -> tuple[float, float]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            report = await calibration_job(ctl)
            assert report["actuators"]["c1"]["status"] == "ok"
            share = ctl.crosstalk.shares["c1"]["p1"]
            gate_of = {g: i for i, g in enumerate(inprocess.get(name).truth().gate_ids)}
            await ctl.set({"p1": 40.0}, volts=True)
            await ctl.set({"c1": 0.5})
            await asyncio.sleep(0.005)
            kappa = float(inprocess.get(name).truth().kappa[gate_of["g1"]])
            await ctl.disarm()
            return share, kappa

    share, kappa = run(scenario())
    assert share == pytest.approx(0.02, rel=0.15)
    assert kappa == pytest.approx(0.5, abs=0.01)
    result = check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log))
    assert not result.violations
