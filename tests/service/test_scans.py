"""Fault scans through the daemon: bus ops, client, command line, report files, journal, telemetry and the
schedule (under an injected clock)."""

from __future__ import annotations

import asyncio
import datetime
import json
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.errors import BusError, UnknownTargetRefused
from meshwarden.journal import Journal
from meshwarden.service.jobs import Jobs
from meshwarden.service.scans import ScanService, changes
from meshwarden.service.schema import parse_request
from tests.procedures.scan_bench import OPERATING_POINT, write_scan_bench
from tests.service.daemon import Daemon, start_daemon

PINNED = {"frames", "actuators", "monitors", "changed"}


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[Daemon]:
    config, _ = write_scan_bench(tmp_path)
    d = start_daemon(config, tmp_path)
    yield d
    assert d.stop() == 0, d.log.read_text()
    assert "Traceback" not in d.log.read_text()


def cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "meshwarden.cli", *args], capture_output=True, text=True, timeout=60)


def test_scan_through_the_client_keeps_reports_and_journals_them(daemon: Daemon, tmp_path: Path) -> None:
    """Client.scan runs a scan job whose report is kept beside the journal, journaled, published on the scan
    topic and listed by Client.scans with its counts; a second scan reports no change."""
    with daemon.client() as mw:
        mw.arm()
        mw.set(OPERATING_POINT)
        stream = mw.subscribe(["scan"], timeout_s=5)
        first = mw.scan()
        topic, message = next(stream)
        second = mw.scan(["a0", "a1c"])
        history = mw.scans()
    assert first["state"] == "done" and set(first["scan"]) >= PINNED
    report = first["scan"]
    # no lattice topology in this configuration: what responds is ok, nothing else may be called ok
    assert report["actuators"]["a0c"]["verdict"] == "ok"
    assert report["actuators"]["b0p"]["verdict"] == "unobservable"
    assert report["changed"] == [] and report["previous"] is None
    assert (topic, message["id"]) == ("scan", report["id"])
    assert second["scan"]["changed"] == [] and second["scan"]["previous"] == report["id"]
    assert sorted(second["scan"]["actuators"]) == ["a0c", "a0p", "a1c"]
    assert [h["id"] for h in history] == [second["scan"]["id"], report["id"]]
    assert history[1]["counts"]["actuators"]["ok"] >= 10 and history[1]["findings"] == 0
    assert sorted(p.name for p in (tmp_path / "scans").iterdir()) == sorted(f"{h['id']}.json" for h in history)
    wanted, deadline = [report["id"], second["scan"]["id"]], time.monotonic() + 10.0
    while True:  # events are journaled by the daemon's writer thread a moment after its reply
        with Journal(tmp_path / "journal.sqlite") as journal:
            seen = [e.detail["scan"] for e in journal.events(kind="scan")]
        if seen == wanted or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    assert seen == wanted


def test_scan_and_scans_on_the_command_line(daemon: Daemon, tmp_path: Path) -> None:
    """`meshwarden scan --json` prints exactly the pinned keys; --report writes the report; --plot without
    matplotlib says so and still succeeds; `meshwarden scans --json` lists the scan; bad targets exit 1."""
    with daemon.client() as mw:
        mw.arm()
        mw.set(OPERATING_POINT)
    text_report = tmp_path / "report.txt"
    plot = tmp_path / "scan.png"
    done = cli("scan", "--json", "--report", str(text_report), "--plot", str(plot), "--endpoint", daemon.endpoint)
    assert done.returncode == 0, done.stderr
    printed = json.loads(done.stdout)
    assert set(printed) == PINNED
    assert isinstance(printed["frames"], int) and printed["actuators"]["a0c"]["verdict"] == "ok"
    assert "monitor frames" in text_report.read_text()
    try:
        import matplotlib  # type: ignore[import-not-found, unused-ignore]  # noqa: F401

        assert plot.exists()
    except ImportError:
        assert "--plot needs matplotlib" in done.stderr and not plot.exists()
    listed = cli("scans", "--json", "--endpoint", daemon.endpoint)
    assert listed.returncode == 0 and [h["frames"] for h in json.loads(listed.stdout)] == [printed["frames"]]
    table = cli("scans", "--endpoint", daemon.endpoint)
    assert table.returncode == 0 and "request" in table.stdout
    refused = cli("scan", "nope", "--endpoint", daemon.endpoint)
    assert refused.returncode == 1 and "unknown_target" in refused.stderr and "Traceback" not in refused.stderr


def test_plot_without_matplotlib_is_skipped_with_a_clear_message(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """--plot when matplotlib cannot be imported draws nothing and says how to get it."""
    from meshwarden import cli_scan

    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import now raises ImportError
    cli_scan._plot(tmp_path / "x.png", {"actuators": {}, "monitors": {}})
    assert "pip install 'meshwarden[plot]'" in capsys.readouterr().err
    assert not (tmp_path / "x.png").exists()


@pytest.mark.parametrize(
    ("args", "code"),
    [
        ({"targets": "a0"}, "bad_request"),
        ({"targets": [3]}, "bad_request"),
        ({"targets": ["x" * 101]}, "out_of_range"),
        ({"wait": "yes"}, "bad_request"),
    ],
)
def test_scan_arguments_are_checked_by_the_schema(args: dict[str, Any], code: str) -> None:
    """Bad scan arguments are refused with a specific code before any handler runs."""
    raw = json.dumps({"v": 1, "id": "r1", "client": "c", "op": "scan", "args": args}).encode()
    with pytest.raises(BusError) as caught:
        parse_request(raw)
    assert caught.value.code == code


def test_scans_limit_is_range_checked() -> None:
    """`scans` takes a limit of 1 to 1000, never clamped."""
    raw = json.dumps({"v": 1, "id": "r1", "client": "c", "op": "scans", "args": {"limit": 0}}).encode()
    with pytest.raises(BusError) as caught:
        parse_request(raw)
    assert caught.value.code == "out_of_range"


def test_changes_name_each_part_whose_verdict_moved() -> None:
    """A part whose verdict differs from the previous report, or that is new, is listed; others are not."""
    before = {"actuators": {"a": {"verdict": "ok"}, "b": {"verdict": "ok"}}, "monitors": {"m": {"verdict": "ok"}}}
    after = {
        "actuators": {"a": {"verdict": "ok"}, "b": {"verdict": "no_response"}, "c": {"verdict": "ok"}},
        "monitors": {"m": {"verdict": "dead"}},
    }
    assert changes(before, after) == [
        {"part": "b", "kind": "actuator", "was": "ok", "now": "no_response"},
        {"part": "c", "kind": "actuator", "was": None, "now": "ok"},
        {"part": "m", "kind": "monitor", "was": "ok", "now": "dead"},
    ]
    assert changes(None, after) == []


class FakeClock:
    """Wall time that jumps: sleeping advances it at once (an accelerated clock for the schedule)."""

    def __init__(self, start: float) -> None:
        self.now = start
        self.slept: list[float] = []
        self.before_wake: dict[int, Any] = {}  # sleep number -> what happens meanwhile

    def __call__(self) -> float:
        return self.now

    async def sleep(self, seconds: float) -> None:
        self.slept.append(seconds)
        self.now += seconds
        self.before_wake.get(len(self.slept), lambda: None)()
        await asyncio.sleep(0)


def test_scheduled_scans_run_every_period_and_skip_while_a_claim_holds(tmp_path: Path) -> None:
    """With `scans: every_s: 6 h` the daemon scans every six (simulated) hours; a due scan is skipped and the
    skip journaled while a lease holds a target, and the next one runs after the lease is gone."""
    path, rack = write_scan_bench(tmp_path, extra="scans: {every_s: 6 h, targets: [a0, a1]}\n")
    config = load_config(path)
    published: list[tuple[str, dict[str, Any]]] = []

    async def publish(topic: str, body: dict[str, Any]) -> int:
        published.append((topic, body))
        return len(published)

    async def scenario() -> list[dict[str, Any]]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set(OPERATING_POINT)
            clock = FakeClock(1_800_000_000.0)
            leases: list[Any] = []
            # while the third due time comes, a client leases a1c; it lets go before the fourth
            clock.before_wake[3] = lambda: leases.append(ctl.claims.hold_now("alice", ["a1c"], ttl_s=60.0))
            clock.before_wake[4] = lambda: ctl.claims.release(leases[0])
            service = ScanService(ctl, Jobs(publish), publish, clock=clock, sleep=clock.sleep)
            schedule = asyncio.ensure_future(service.run_schedule())
            while len(service.store.ids()) < 3:
                await asyncio.sleep(0.01)
            schedule.cancel()
            with pytest.raises(asyncio.CancelledError):
                await schedule
            assert clock.slept[:4] == [6 * 3600.0] * 4
            assert [body.get("state") for _, body in published if _ == "scan"][2] == "skipped"
            return service.store.history()

    try:
        history = asyncio.run(scenario())
    finally:
        inprocess.remove(rack)
    assert [h["trigger"] for h in history] == ["schedule"] * 3
    assert all(set(h["counts"]["actuators"]) <= {"ok", "unobservable"} for h in history)
    with Journal(tmp_path / "journal.sqlite") as journal:
        skipped = journal.events(kind="scan_skipped")
    assert len(skipped) == 1 and skipped[0].detail["reason"] == "a1c is held by 'alice'"


def test_time_of_day_schedule_is_the_next_occurrence(tmp_path: Path) -> None:
    """`scans: at: "02:30"` is due at the next 02:30 local time: later today, or tomorrow once passed."""
    path, rack = write_scan_bench(tmp_path, extra='scans: {at: "02:30"}\n')
    config = load_config(path)

    async def scenario() -> tuple[float | None, float | None, float]:
        async with open_controller(config) as ctl:
            service = ScanService(ctl, Jobs(_nothing), _nothing)
            morning = datetime.datetime(2026, 12, 2, 1, 0).astimezone().timestamp()
            noon = datetime.datetime(2026, 12, 2, 12, 0).astimezone().timestamp()
            return service.next_due(morning), service.next_due(noon), morning

    try:
        first, second, morning = asyncio.run(scenario())
    finally:
        inprocess.remove(rack)
    assert first == datetime.datetime(2026, 12, 2, 2, 30).astimezone().timestamp()
    assert second == datetime.datetime(2026, 12, 3, 2, 30).astimezone().timestamp()
    assert first is not None and first > morning


async def _nothing(topic: str, body: dict[str, Any]) -> int:
    return 0


@pytest.mark.parametrize(
    ("section", "message"),
    [
        ('scans: {every_s: 6 h, at: "02:30"}', "not both"),
        ("scans: {at: 150}", "HH:MM"),
        ('scans: {at: "25:00"}', "HH:MM"),
        ("scans: {targets: [zz]}", "not an actuator or gate"),
        ("scans: {k_sigma: 0}", "standard deviations"),
        ("scans: {every: 6 h}", "unknown key 'every'"),
        ("scans: {second_look_factor: 0.5}", "how many times the first step a second look takes, from 1 to 1000"),
        ("scans: {integration_s: 0 s}", "must be greater than 0 s"),
        ("scans: {integration_s: 20 s}", "must be at most 10 s"),
        ("scans: {temperature_k: -3}", "detectors' temperature in kelvin, from 1 to 1000"),
        ("scans: {dark_current_a: -1 nA}", "must be at least 0 A"),
        ("scans: {dark_current_a: 5 V}", "dark_current_a"),
        ("scans: {false_alarm: 0.5}", "false-alarm probability above 0 and at most 0.01"),
        ("scans: {crosstalk_share_max: 0.9}", "share of a neighbour's drive from 0 to 0.5"),
        ("scans: {crosstalk_share_max: yes}", "share of a neighbour's drive from 0 to 0.5"),
        ("scans: {loss_floor: 0}", "least share of conserved light a tap receives, above 0 and at most 1"),
        ("scans: {path_loss_db_max: 5}", "how many dB two taps' paths may differ in loss, from 0 to 3"),
        ("scans: {look_max_step_volts: -2 V}", "must be greater than 0 V"),
    ],
)
def test_bad_scans_sections_are_refused(tmp_path: Path, section: str, message: str) -> None:
    """A wrong `scans:` section is a configuration error that names the problem."""
    from meshwarden.errors import ConfigError

    path, _ = write_scan_bench(tmp_path, extra=section + "\n")
    with pytest.raises(ConfigError) as caught:
        load_config(path)
    assert message in str(caught.value) or any(message in str(i) for i in caught.value.issues)


def test_configured_scan_settings_take_effect(tmp_path: Path) -> None:
    """Every setting of a scan is read from `scans:`; a configured crosstalk share bound is the one a scan judges by."""
    from dataclasses import fields

    from meshwarden.procedures.scan_run import ScanSettings, run_scan
    from meshwarden.service.scans import settings_from_config, topology_from_config

    section = (
        "scans: {second_look_factor: 12, integration_s: 2 ms, temperature_k: 290, dark_current_a: 3 nA, "
        "false_alarm: 1.0e-5, crosstalk_share_max: 0.011, loss_floor: 0.7, path_loss_db_max: 0.3, "
        "look_max_step_volts: 6 V}\n"
    )
    path, rack = write_scan_bench(tmp_path, extra=section)
    config = load_config(path)
    wanted = {
        "second_look_factor": 12.0,
        "integration_s": 2e-3,
        "temperature_k": 290.0,
        "dark_current_a": 3e-9,
        "false_alarm": 1e-5,
        "crosstalk_share_max": 0.011,
        "loss_floor": 0.7,
        "path_loss_db_max": 0.3,
        "look_max_step_volts": 6.0,
    }

    async def scenario() -> tuple[ScanSettings, dict[str, Any]]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set(OPERATING_POINT)
            settings = settings_from_config(ctl)
            report = await run_scan(ctl, ["a0"], owner="scan:t", settings=settings, topology=topology_from_config(ctl))
            return settings, report

    try:
        settings, report = asyncio.run(scenario())
    finally:
        inprocess.remove(rack)
    assert {f.name for f in fields(ScanSettings)} <= {f.name for f in fields(type(config.scans))}
    assert {name: getattr(settings, name) for name in wanted} == pytest.approx(wanted)
    for kind in ("within_gate", "between_gates"):
        share = report["crosstalk_share"][kind]
        assert share["bound"] <= 0.011
        if share["measured_from"] == 0:
            assert share["bound"] == pytest.approx(0.011)


def test_an_unknown_scan_target_is_refused_before_a_job_starts(tmp_path: Path) -> None:
    """ScanService.start refuses an unknown target with unknown_target, and no job is created."""
    path, rack = write_scan_bench(tmp_path)
    config = load_config(path)

    async def scenario() -> int:
        async with open_controller(config) as ctl:
            jobs = Jobs(_nothing)
            with pytest.raises(UnknownTargetRefused):
                ScanService(ctl, jobs, _nothing).start(["nope"], "c")
            return len(jobs.list())

    try:
        assert asyncio.run(scenario()) == 0
    finally:
        inprocess.remove(rack)
