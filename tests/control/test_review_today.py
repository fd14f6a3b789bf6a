"""Adversarial checks of the day's changes (emergency-stop marker, `serve --calibration`,
activation with shares, rule 4 across concurrent requests), observed at the simulated boards."""

from __future__ import annotations

import asyncio
import math
import shutil
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.calibration_store import CalibrationStore
from meshwarden.config import Config
from meshwarden.drivers.base import BoardIdentity
from meshwarden.errors import MeshwardenError
from meshwarden.journal import Journal, TargetRecord
from meshwarden.startup import BoardFound, stop_never_reached
from meshwarden.writelog import check_board_log
from tests.control.bench import write_bench
from tests.control.conftest import run
from tests.control.test_review_crosstalk import _version_with

Bench = Callable[..., tuple[Config, str]]
VOLTS_PER_CODE = 60.0 / 65536  # the bench board: 16-bit DAC, 60 V full scale


def _worst_equivalent(log: list[tuple[object, ...]], on: int, by: int, share: float) -> float:
    """The highest sqrt(V_on^2 + share x V_by^2) the board held after any write (channels of b0)."""
    held = {on: 0.0, by: 0.0}
    worst = 0.0
    for _, kind, first, values in log:
        if kind == "write":
            for k, code in enumerate(values):  # type: ignore[arg-type]
                if first + k in held:  # type: ignore[operator]
                    held[first + k] = code * VOLTS_PER_CODE  # type: ignore[operator]
            worst = max(worst, math.sqrt(held[on] ** 2 + share * held[by] ** 2))
    return worst


def test_a_set_beside_a_restore_cannot_pass_the_limit_through_crosstalk(make_bench: Bench) -> None:
    """With p0's share 0.5 on c0 (limit 40 V), c0 journaled at 35 V and the board reset: while
    restore ramps c0 back to 35 V, a set of p0 (never journaled) to 44 V must be refused, since
    where the restore ends c0 is driven as sqrt(35^2 + 0.5 x 44^2) = 46.8 V; the board never holds
    more than 40 V equivalent."""
    config, name = make_bench(within_gate=0.0)

    async def scenario() -> str:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-restore", {"c0": {"p0": 0.5}})
            await ctl.activate_calibration("xt-restore")
            await ctl.arm()
            await ctl.set({"c0": 35.0}, volts=True)
            rack = inprocess.get(name)
            rack.board("b0").power_cycle(rack.clock.now() - 1.0)  # a brown-out: c0 at 0 V
            await ctl.heartbeat_once()
            await ctl.arm()
            restoring = asyncio.create_task(ctl.restore(client="restorer"))
            while not 0.0 < ctl.describe("c0")["volts"] < 20.0:
                await asyncio.sleep(0.0005)
            outcome = "applied"
            try:
                await ctl.set({"p0": 44.0}, volts=True, client="second")
            except MeshwardenError as exc:
                outcome = exc.code
            await restoring
            await ctl.disarm()
            return outcome

    outcome = run(scenario())
    log = list(inprocess.get(name).board("b0").write_log)
    assert not check_board_log(config, "b0", log).violations
    worst = _worst_equivalent(log, 0, 1, 0.5)  # b0:0 is c0, b0:1 is p0
    assert worst <= 40.0 + 1e-6, f"set beside restore: {outcome}; c0 driven as {worst:.2f} V"


def _serve(config: Path, *more: str) -> subprocess.CompletedProcess[str]:
    """`meshwarden serve` on ports it cannot bind (port 9): it stops at start, after the
    calibration choice, so only what that choice did is seen."""
    unbindable = ["--bind", "tcp://127.0.0.1:9", "--pub", "tcp://127.0.0.1:9"]
    return subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", "serve", "--config", str(config), *more, *unbindable],
        capture_output=True,
        text=True,
        timeout=120,
    )


def _stored(tmp_path: Path, version: str) -> Path:
    """A version folder holding copies of the bench's own tables and an empty manifest."""
    folder = tmp_path / "calibration" / "versions" / version
    folder.mkdir(parents=True)
    for table in (tmp_path / "cal").glob("*.yaml"):
        shutil.copy(table, folder / table.name)
    (folder / "manifest.yaml").write_text("{}\n", encoding="utf-8")
    return folder


@pytest.mark.parametrize("version", ["..", ".", "", ".good.partial"])
def test_serve_calibration_refuses_a_name_that_is_no_version_and_keeps_the_pointer(
    tmp_path: Path, version: str
) -> None:
    """`serve --calibration` with '..', '.', an empty name or a staging folder's name is a usage
    error naming the version, and the active pointer stays on the version it named before."""
    config, _ = write_bench(tmp_path)
    _stored(tmp_path, "good")
    (tmp_path / "calibration" / "versions" / ".good.partial").mkdir()
    (tmp_path / "calibration" / "active").write_text("good\n", encoding="utf-8")
    result = _serve(config, "--calibration", version)
    assert result.returncode == 2, result.stderr
    assert f"no calibration version '{version}'" in result.stderr, result.stderr
    assert (tmp_path / "calibration" / "active").read_text(encoding="utf-8").strip() == "good"


def test_serve_calibration_that_does_not_fit_leaves_the_active_version_as_it_was(tmp_path: Path) -> None:
    """A start refused because the version named by `serve --calibration` does not fit the
    configuration changes nothing: the version active before stays active."""
    config, _ = write_bench(tmp_path)
    _stored(tmp_path, "good")
    bad = _stored(tmp_path, "bad")
    shutil.copy(tmp_path / "cal" / "p0.yaml", bad / "c0.yaml")  # a phase table for a coupler
    (tmp_path / "calibration" / "active").write_text("good\n", encoding="utf-8")
    result = _serve(config, "--calibration", "bad")
    assert result.returncode == 2 and "table c0 does not fit" in result.stderr, result.stderr
    assert (tmp_path / "calibration" / "active").read_text(encoding="utf-8").strip() == "good"


@pytest.mark.parametrize("manifest", [b": : :\n  - [\n", b"\xff\xfe\x00garbage"])
def test_a_version_whose_manifest_is_garbage_is_refused_by_name(tmp_path: Path, manifest: bytes) -> None:
    """A version folder whose manifest is not YAML (or not text) is refused at start with a
    message that names the version and the way out, not reported as an internal error."""
    config, _ = write_bench(tmp_path)
    (_stored(tmp_path, "junk") / "manifest.yaml").write_bytes(manifest)
    result = _serve(config, "--calibration", "junk")
    assert result.returncode == 2, result.stderr
    assert "internal error" not in result.stderr and "Traceback" not in result.stderr, result.stderr
    assert "calibration version 'junk'" in result.stderr and "serve --calibration VERSION" in result.stderr


def test_after_activating_shares_that_show_a_limit_passed_lowering_is_still_allowed(make_bench: Bench) -> None:
    """c0 at 38 V and p0 at 40 V, then a version with p0's share 0.5 on c0 is activated (c0 now
    driven as 47.4 V against its 40 V limit): a request that only lowers outputs is the way out and
    is applied at the board, not refused as 'limit'."""
    config, name = make_bench(within_gate=0.0)

    async def scenario() -> list[str]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 38.0, "p0": 40.0}, volts=True)
            await _version_with(ctl, "xt-over", {"c0": {"p0": 0.5}})
            await ctl.activate_calibration("xt-over")
            outcomes = []
            for request in ({"p0": 30.0}, {"c0": 30.0, "p0": 20.0}):
                try:
                    await ctl.set(request, volts=True)
                    outcomes.append("applied")
                except MeshwardenError as exc:
                    outcomes.append(exc.code)
            await ctl.disarm()
            return outcomes

    assert run(scenario()) == ["applied", "applied"]
    log = list(inprocess.get(name).board("b0").write_log)
    assert not check_board_log(config, "b0", log).violations
    lowest = {0: 60.0, 1: 60.0}
    for _, kind, first, values in log:
        if kind == "write" and first == 0 and len(values) == 2 and values[0]:
            lowest = {0: min(lowest[0], values[0] * VOLTS_PER_CODE), 1: min(lowest[1], values[1] * VOLTS_PER_CODE)}
    assert lowest[0] < 30.01 and lowest[1] < 20.01  # the board received the lowered drives


def test_a_request_in_volts_reports_the_value_its_neighbours_crosstalk_gives(make_bench: Bench) -> None:
    """With p0's share 0.3 on c0 and p0 at 40 V, c0 set to 25 V (in volts) is reported at its
    table's value for V_eq = sqrt(25^2 + 0.3 x 40^2), the superposition of squared drives
    (electrostatic force goes as V^2: Senturia, Microsystem Design, ch. 6), not its value at 25 V
    alone."""
    config, _ = make_bench(within_gate=0.3)

    async def scenario() -> tuple[float | None, float]:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-volts", {"c0": {"p0": 0.3}})
            await ctl.activate_calibration("xt-volts")
            await ctl.arm()
            await ctl.set({"p0": 40.0}, volts=True)
            await ctl.set({"c0": 25.0}, volts=True)
            described = ctl.describe("c0")
            volts_p0 = ctl.describe("p0")["volts"]
            really = ctl.actuators["c0"].map.value_at(math.sqrt(described["volts"] ** 2 + 0.3 * volts_p0**2))
            await ctl.disarm()
            return described["value"], really

    reported, really = run(scenario())
    assert reported is not None and abs(reported - really) < 1e-3, (reported, really)


def test_a_neighbour_moved_while_a_logical_set_ramps_is_counted_in_its_reported_value(make_bench: Bench) -> None:
    """c0 asked for its value at 25 V alone while another client drives p0 (share 0.3 on c0) to
    40 V at the same time: once both are done, c0's reported value is its table at
    V_eq = sqrt(V_c0^2 + 0.3 V_p0^2) of what the board holds (Senturia, Microsystem Design, ch. 6),
    not the value asked with p0 at 0 V."""
    config, name = make_bench(within_gate=0.3)

    async def scenario() -> tuple[float | None, float]:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-both", {"c0": {"p0": 0.3}, "p0": {"c0": 0.3}})
            await ctl.activate_calibration("xt-both")
            await ctl.arm()
            wanted = ctl.actuators["c0"].map.value_at(25.0)
            first = asyncio.create_task(ctl.set({"c0": wanted}, client="first"))
            await asyncio.sleep(0)
            second = asyncio.create_task(ctl.set({"p0": 40.0}, volts=True, client="second"))
            await asyncio.gather(first, second)
            codes = inprocess.get(name).board("b0").codes
            volts_c0, volts_p0 = codes[0] * VOLTS_PER_CODE, codes[1] * VOLTS_PER_CODE  # what the board holds
            really = ctl.actuators["c0"].map.value_at(math.sqrt(volts_c0**2 + 0.3 * volts_p0**2))
            reported = ctl.describe("c0")["value"]
            await ctl.disarm()
            return reported, really

    reported, really = run(scenario())
    assert reported is not None and abs(reported - really) < 1e-3, (reported, really)


def test_a_restart_finishes_an_emergency_stop_that_never_reached_a_board(make_bench: Bench) -> None:
    """An emergency stop that could not reach b0 (its link dropping every frame) answers that its
    zero is retried and the board's watchdog will act; the daemon is then stopped and started again
    with the link back. The new daemon must not adopt and keep feeding the pre-stop outputs: it
    starts with the stop latched and b0's zero pending, and its first heartbeat zeroes the board."""
    config, name = make_bench(timeout_s=0.02, retries=1, error_rate_limit=0.2)

    async def first() -> list[int]:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)  # made when the link first opens
            await ctl.arm()
            await ctl.set({"c0": 20.0, "p0": 30.0}, volts=True)
            rack.inject(Fault("drop", "*", 1.0))
            outcome = await ctl.estop(reason="review")
            assert outcome["b0"].startswith("not confirmed"), outcome
            return [int(c) for c in rack.board("b0").codes[:2]]

    async def second() -> tuple[bool, list[int], list[int]]:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            at_start = [int(c) for c in rack.board("b0").codes[:2]]
            await ctl.heartbeat_once()
            return ctl.estopped, at_start, [int(c) for c in rack.board("b0").codes[:2]]

    held = run(first())
    assert all(held)  # the stop never reached the board: it still holds c0 and p0
    rack = inprocess.get(name)
    rack.links["b0"].rates.clear()
    estopped, at_start, after_beat = run(second())
    assert at_start == held  # nothing written while starting (rule 5)
    assert estopped and after_beat == [0, 0], (estopped, at_start, after_beat)
    assert not check_board_log(config, "b0", list(rack.board("b0").write_log)).violations


def test_a_set_journaled_before_a_stop_and_released_after_a_rearm_writes_nothing(make_bench: Bench) -> None:
    """A set whose targets were queued in the journal before an emergency stop's marker, and whose
    wait for the disk ends only after the stop and a re-arm, writes nothing: the board keeps c0 at
    0 V, so the marker reading those targets as zero is the truth at the board."""
    config, name = make_bench()

    async def scenario() -> str:
        async with open_controller(config) as ctl:
            await ctl.arm()
            gate = asyncio.Event()
            durable = ctl._durable

            async def slow_disk(*args: object, **kwargs: object) -> None:
                await durable(*args, **kwargs)  # type: ignore[arg-type]
                await gate.wait()

            ctl._durable = slow_disk  # type: ignore[method-assign]
            first = asyncio.create_task(ctl.set({"c0": 20.0}, volts=True))
            while ctl.journal.target_count() == 0:
                await asyncio.sleep(0.001)
            await ctl.estop(reason="review")
            await ctl.arm()
            gate.set()
            outcome = "applied"
            try:
                await first
            except MeshwardenError as exc:
                outcome = exc.code
            ctl._durable = durable  # type: ignore[method-assign]
            assert {a: r.code for a, r in ctl.journal.latest_targets().items()}.get("c0", 0) == 0
            await ctl.disarm()
            return outcome

    outcome = run(scenario())
    log = list(inprocess.get(name).board("b0").write_log)
    assert not [entry for entry in log if entry[1] == "write" and any(entry[3])], (outcome, log)
    assert outcome == "stopped"  # refused whole, as any motion a stop overtook


def test_a_target_set_after_a_stop_and_rearm_is_adopted_and_restored(make_bench: Bench) -> None:
    """Re-armed right after an emergency stop, c0 set to 20 V: a restart adopts it without a write
    (rule 5), and after a brown-out restore brings back 20 V, not the zero of the earlier stop."""
    config, name = make_bench()

    async def first() -> int:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 30.0, "p0": 10.0}, volts=True)
            await ctl.estop(reason="review")
            await ctl.arm()
            return int((await ctl.set({"c0": 20.0}, volts=True))["c0"]["code"])

    async def second() -> tuple[bool, int, int]:
        async with open_controller(config) as ctl:
            rack = inprocess.get(name)
            writes = rack.board("b0").writes_executed
            adopted = not ctl.boards["b0"].needs_restore and ctl.describe("c0")["value"] is not None
            rack.board("b0").power_cycle(rack.clock.now() - 1.0)
            await ctl.heartbeat_once()
            await ctl.arm()
            await ctl.restore()
            held = int(rack.board("b0").codes[0]), int(rack.board("b0").codes[1])
            await ctl.disarm()
            return adopted and rack.board("b0").writes_executed > writes, held[0], held[1]

    code = run(first())
    adopted, c0, p0 = run(second())
    assert adopted and (c0, p0) == (code, 0), (adopted, c0, p0, code)
    assert not check_board_log(config, "b0", list(inprocess.get(name).board("b0").write_log)).violations


def test_activating_a_version_of_some_tables_recomputes_every_value_its_shares_change(make_bench: Bench) -> None:
    """A stored version holding c0's table alone, with c0's share 0.3 on p0: activating it changes
    what p0's present drive means too, so p0's reported value becomes its table at
    V_eq = sqrt(V_p0^2 + 0.3 V_c0^2) (Senturia, Microsystem Design, ch. 6), not the value it had
    without the share."""
    config, _ = make_bench(within_gate=0.3)

    async def scenario() -> tuple[float | None, float]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set({"c0": 35.0}, volts=True)
            await ctl.set({"p0": ctl.actuators["p0"].map.value_at(30.0)})
            tables = {"c0": ctl.active_tables()["c0"]}
            manifest = {"format": "meshwarden-calibration-version/1", "crosstalk": {"p0": {"c0": 0.3}}}
            ctl.calibrations.write("c0-only", tables, manifest)
            await ctl.activate_calibration("c0-only")
            volts_c0, volts_p0 = ctl.describe("c0")["volts"], ctl.describe("p0")["volts"]
            really = ctl.actuators["p0"].map.value_at(math.sqrt(volts_p0**2 + 0.3 * volts_c0**2))
            reported = ctl.describe("p0")["value"]
            await ctl.disarm()
            return reported, really

    reported, really = run(scenario())
    assert reported is not None and abs(reported - really) < 1e-3, (reported, really)


def test_a_procedure_move_and_a_set_on_neighbours_cannot_both_pass(make_bench: Bench) -> None:
    """Shares 0.5 both ways between c0 (limit 40 V) and p0 (limit 44 V): while a procedure's
    claim ramps c0 to 35 V, another client's set of p0 to 44 V (c0 as 46.8 V, p0 as 50.5 V where
    both end) is refused, and a cancelled procedure move leaves no ramp behind: p0 to 20 V is then
    applied. The board never holds either past its limit."""
    config, name = make_bench(within_gate=0.0)

    async def scenario() -> tuple[str, int]:
        async with open_controller(config) as ctl:
            await _version_with(ctl, "xt-claim", {"c0": {"p0": 0.5}, "p0": {"c0": 0.5}})
            await ctl.activate_calibration("xt-claim")
            await ctl.arm()
            async with ctl.claim(["c0"], owner="procedure", purpose="review") as held:
                moving = asyncio.create_task(held.move({"c0": 35.0}, volts=True))
                while not 0.0 < ctl.describe("c0")["volts"] < 20.0:
                    await asyncio.sleep(0.0005)
                outcome = "applied"
                try:
                    await ctl.set({"p0": 44.0}, volts=True, client="other")
                except MeshwardenError as exc:
                    outcome = exc.code
                moving.cancel()
                await asyncio.gather(moving, return_exceptions=True)
            await ctl.set({"p0": 20.0}, volts=True, client="other")
            p0_code = int(inprocess.get(name).board("b0").codes[1])
            await ctl.disarm()
            return outcome, p0_code

    outcome, p0_code = run(scenario())
    assert outcome == "limit" and abs(p0_code * VOLTS_PER_CODE - 20.0) < 0.01
    log = list(inprocess.get(name).board("b0").write_log)
    assert not check_board_log(config, "b0", log).violations
    assert _worst_equivalent(log, 0, 1, 0.5) <= 40.0 + 1e-6 and _worst_equivalent(log, 1, 0, 0.5) <= 44.0 + 1e-6


def test_only_a_board_with_nothing_journaled_since_the_stop_is_taken_as_never_reached(tmp_path: Path) -> None:
    """A board is taken as never reached by a stop only while every journaled output of it is read
    as zeroed by the stop's marker and it holds a code the stop took away: once its zeros (or any
    later target) are journaled, codes it holds are an ordinary mismatch, not a stop to finish."""

    def record(actuator: str, channel: int, code: int) -> TargetRecord:
        return TargetRecord(actuator, "b0", channel, code * VOLTS_PER_CODE, code, None, None, 0.0)

    identity = BoardIdentity("sim", (1, 0, 0), 16, 8, 16, 16, 60.0, 2.5, 1, 3, (100_000,))
    holding = BoardFound(identity, (21845, 32768) + (0,) * 14, watchdog_tripped=False)
    with Journal(tmp_path / "j.sqlite") as journal:
        journal.record_targets([record("c0", 0, 21845), record("p0", 1, 32768)])
        journal.mark_all_zero_async().result()
        assert stop_never_reached("b0", holding, journal.latest_targets())
        zeroed = BoardFound(identity, (0,) * 16, watchdog_tripped=False)
        assert not stop_never_reached("b0", zeroed, journal.latest_targets())
        assert not stop_never_reached("b1", holding, journal.latest_targets())
        journal.record_targets([record("c0", 0, 0)])  # a zero journaled since the stop
        assert not stop_never_reached("b0", holding, journal.latest_targets())


def test_a_start_on_an_active_version_whose_folder_is_gone_is_refused_not_silently_config(tmp_path: Path) -> None:
    """The active pointer names a version whose folder has been removed: the daemon must refuse to
    start with the reason and the way out, not start silently on the configuration's own tables
    (the outputs it adopts would then mean other values than the operator chose)."""
    config, _ = write_bench(tmp_path)
    (tmp_path / "calibration" / "versions").mkdir(parents=True)
    (tmp_path / "calibration" / "active").write_text("cal-removed\n", encoding="utf-8")
    result = _serve(config)
    assert result.returncode == 2, result.stderr
    assert "'cal-removed' cannot be used" in result.stderr and "serve --calibration VERSION" in result.stderr


def test_one_damaged_version_does_not_hide_the_others_in_the_list(tmp_path: Path) -> None:
    """`calibration list` with one version whose manifest is not YAML, one whose manifest is a
    list and one whose outcomes are not mappings: every version is listed, the damaged one with
    why it cannot be read, the others with their counts."""
    _stored(tmp_path, "a-good")
    (_stored(tmp_path, "b-junk") / "manifest.yaml").write_bytes(b": : :\n  - [\n")
    (_stored(tmp_path, "c-list") / "manifest.yaml").write_text("[1, 2]\n", encoding="utf-8")
    (_stored(tmp_path, "d-odd") / "manifest.yaml").write_text("actuators: {c0: 3, c1: {status: ok}}\n", "utf-8")
    rows = {row["version"]: row for row in CalibrationStore(tmp_path / "calibration").summary()}
    assert list(rows) == ["config", "a-good", "b-junk", "c-list", "d-odd"]
    assert "calibration version 'b-junk'" in rows["b-junk"]["error"]
    assert rows["c-list"]["counts"] == {} and rows["d-odd"]["counts"] == {"?": 1, "ok": 1}
