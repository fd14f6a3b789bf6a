"""Adversarial checks of the crosstalk correction (each found a defect in review, now mended):
what a request with shares in force really does at the boards and to the chip, against what the
controller reports."""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable
from typing import Any

import pytest

from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import Config
from meshwarden.crosstalk import CrosstalkShares
from meshwarden.errors import CalibrationError, MeshwardenError
from meshwarden.writelog import check_board_log
from tests.control.conftest import run

Bench = Callable[..., tuple[Config, str]]


async def _version_with(ctl: Any, name: str, shares: dict[str, dict[str, float]]) -> None:
    """Store a version with the configuration's tables and the given crosstalk shares."""
    tables = ctl.active_tables()
    manifest = {"format": "meshwarden-calibration-version/1", "version": name, "crosstalk": shares}
    ctl.calibrations.write(name, tables, manifest)


def test_a_request_the_neighbours_overshoot_is_refused_not_silently_clamped(make_bench: Bench) -> None:
    """With p0's share 0.3 on c0 and p0 at 40 V, c0 asked for a value whose V_eq is below
    sqrt(0.3) x 40 V cannot be reached: the request must be refused (rule 6), not answered with
    the asked value while c0 sits at 0 V and the chip is elsewhere."""
    config, name = make_bench(within_gate=0.3)

    async def scenario() -> tuple[float, float | None, float]:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-v1", {"c0": {"p0": 0.3}, "p0": {"c0": 0.3}})
            await ctl.activate_calibration("xt-v1")
            await ctl.arm()
            await ctl.set({"p0": 40.0}, volts=True)
            wanted = ctl.actuators["c0"].map.value_at(15.0)  # its table's value at 15 V alone
            refused = False
            try:
                await ctl.set({"c0": wanted})
            except MeshwardenError:
                refused = True
            described = ctl.describe("c0")
            equivalent = math.sqrt(described["volts"] ** 2 + 0.3 * 40.0**2)
            really = ctl.actuators["c0"].map.value_at(equivalent)
            await ctl.disarm()
            assert refused or described["value"] == pytest.approx(really, abs=1e-3), (
                f"asked {wanted:.4f}, reported {described['value']}, drive {described['volts']} V, "
                f"really {really:.4f} (V_eq {equivalent:.2f} V)"
            )
            return wanted, described["value"], really

    run(scenario())
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_a_share_matrix_that_cannot_be_solved_is_a_clear_refusal(make_bench: Bench) -> None:
    """Shares of 0.5 between both couplers and both phase shifters (each inside 0..0.5) make I + S
    singular (eigenvalue -1 of S for this complete bipartite pattern): activating such a version
    is refused with a CalibrationError and changes nothing, and solving with such shares directly
    gives a CalibrationError, never numpy's LinAlgError."""
    config, name = make_bench()
    shares = {
        "c0": {"p0": 0.5, "p1": 0.5},
        "c1": {"p0": 0.5, "p1": 0.5},
        "p0": {"c0": 0.5, "c1": 0.5},
        "p1": {"c0": 0.5, "c1": 0.5},
    }
    with pytest.raises(CalibrationError, match="cannot be solved"):
        CrosstalkShares(shares).drive_volts({a: 20.0 for a in shares}, {})

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-sing", shares)
            with pytest.raises(CalibrationError, match="add up to"):
                await ctl.activate_calibration("xt-sing")
            assert ctl.calibrations.active() == "config" and not ctl.crosstalk
            await ctl.arm()
            values = {a: ctl.actuators[a].map.value_at(20.0) for a in ("c0", "c1", "p0", "p1")}
            try:
                await ctl.set(values)
            finally:
                await ctl.disarm()

    run(scenario())
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_moving_a_neighbour_leaves_the_controller_believing_an_old_value(make_bench: Bench) -> None:
    """c0 set to a value with p0 at 0 V; then p0 is driven to 40 V (share 0.3 on c0): the chip's
    coupling moves, and the controller's reported value of c0 should follow (rule 7) or be unknown."""
    config, name = make_bench(within_gate=0.3)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-v2", {"c0": {"p0": 0.3}, "p0": {"c0": 0.3}})
            await ctl.activate_calibration("xt-v2")
            await ctl.arm()
            wanted = ctl.actuators["c0"].map.value_at(25.0)
            await ctl.set({"c0": wanted})
            await ctl.set({"p0": 40.0}, volts=True)
            described = ctl.describe("c0")
            equivalent = math.sqrt(described["volts"] ** 2 + 0.3 * 40.0**2)
            really = ctl.actuators["c0"].map.value_at(equivalent)
            await ctl.disarm()
            assert described["value"] is None or described["value"] == pytest.approx(really, abs=1e-3), (
                f"reported {described['value']}, really {really:.4f}"
            )

    run(scenario())
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_no_request_drives_an_actuator_past_its_limit_through_its_neighbours(make_bench: Bench) -> None:
    """With p0's measured share 0.5 on c0 (limit 40 V): c0 at 35 V, then p0 to 44 V would drive c0
    as sqrt(35^2 + 0.5 x 44^2) = 46.8 V - refused; p0 to 20 V (c0 as 37.7 V) is allowed; then c0
    to 38 V (as 40.5 V) is refused. The board never received a refused value."""
    config, name = make_bench(within_gate=0.0)

    async def scenario() -> list[str]:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-limit", {"c0": {"p0": 0.5}})
            await ctl.activate_calibration("xt-limit")
            await ctl.arm()
            await ctl.set({"c0": 35.0}, volts=True)
            refusals = []
            with pytest.raises(MeshwardenError) as err:
                await ctl.set({"p0": 44.0}, volts=True)
            refusals.append(err.value.code)
            await ctl.set({"p0": 20.0}, volts=True)
            with pytest.raises(MeshwardenError) as err:
                await ctl.set({"c0": 38.0}, volts=True)
            refusals.append(err.value.code)
            await ctl.disarm()
            return refusals

    assert run(scenario()) == ["limit", "limit"]
    log = list(inprocess.get(name).board("b0").write_log)
    assert not check_board_log(config, "b0", log).violations
    volts_per_code = 60.0 / 65536
    written = {ch: [] for ch in (0, 1)}  # b0:0 is c0, b0:1 is p0
    for _, kind, first, values in log:
        if kind == "write":
            for k, code in enumerate(values):
                if first + k in written:
                    written[first + k].append(code * volts_per_code)
    assert max(written[0]) < 35.01 and max(written[1]) < 20.01


def test_activating_shares_reports_what_the_present_volts_mean_with_them(make_bench: Bench) -> None:
    """c0 set to a value under the configuration's tables, p0 at 40 V; then a version with the same
    tables and p0's share 0.3 on c0 is activated: no output moves, and c0's reported value (and the
    activation's list of changed meanings) is its table at V_eq = sqrt(V^2 + 0.3 V_p0^2), the
    superposition of squared drives (electrostatic force goes as V^2: Senturia, Microsystem
    Design, ch. 6)."""
    config, name = make_bench(within_gate=0.3)

    async def scenario() -> None:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"p0": 40.0}, volts=True)
            await ctl.set({"c0": ctl.actuators["c0"].map.value_at(20.0)})
            volts = ctl.describe("c0")["volts"]
            writes = len(inprocess.get(name).board("b0").write_log)
            await _version_with(ctl, "xt-v3", {"c0": {"p0": 0.3}, "p0": {"c0": 0.3}})
            outcome = await ctl.activate_calibration("xt-v3")
            expected = ctl.actuators["c0"].map.value_at(math.sqrt(volts**2 + 0.3 * 40.0**2))
            assert ctl.describe("c0")["value"] == pytest.approx(expected, abs=1e-4)  # volts as reported: rounded
            assert outcome["changed"]["c0"]["now"] == pytest.approx(expected, abs=1e-4)
            assert len(inprocess.get(name).board("b0").write_log) == writes  # nothing written
            await ctl.disarm()

    run(scenario())
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_a_neighbour_mid_ramp_counts_where_its_ramp_ends(make_bench: Bench) -> None:
    """With p0's share 0.5 on c0 (limit 40 V): p0 ramps from 0 to 44 V (c0 at 0 V: fine alone);
    while it ramps, another client asks c0 for 35 V - with p0 where it is then that looks fine, but
    where p0's ramp ends c0 would be driven as sqrt(35^2 + 0.5 x 44^2) = 46.8 V. It must be
    refused; what the board ends with keeps c0 within its limit."""
    config, name = make_bench(within_gate=0.0)

    async def scenario() -> str:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-race", {"c0": {"p0": 0.5}})
            await ctl.activate_calibration("xt-race")
            await ctl.arm()
            ramp = asyncio.create_task(ctl.set({"p0": 44.0}, volts=True, client="first"))
            while not 0.0 < ctl.describe("p0")["volts"] < 30.0:
                await asyncio.sleep(0.0005)
            outcome = "applied"
            try:
                await ctl.set({"c0": 35.0}, volts=True, client="second")
            except MeshwardenError as exc:
                outcome = exc.code
            await ramp
            await ctl.disarm()
            return outcome

    assert run(scenario()) == "limit"
    log = list(inprocess.get(name).board("b0").write_log)
    assert not check_board_log(config, "b0", log).violations
    volts_per_code = 60.0 / 65536
    held = {0: 0.0, 1: 0.0}  # b0:0 is c0, b0:1 is p0: what the board held after every write
    for _, kind, first, values in log:
        if kind == "write":
            for k, code in enumerate(values):
                if first + k in held:
                    held[first + k] = code * volts_per_code
            assert math.sqrt(held[0] ** 2 + 0.5 * held[1] ** 2) <= 40.0 + 1e-6, held
