"""Daily use against a real daemon process: the demo never touches a daemon it did not start,
outputs are never live without saying so, and the command line does what an engineer reaches for."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import yaml

from meshwarden.errors import MeshwardenError
from meshwarden.journal import Journal
from tests.conftest import DEMO_CONFIG, REPO
from tests.control.bench import write_bench
from tests.service.daemon import Daemon, start_daemon

DEAD = "tcp://127.0.0.1:9"  # the discard port: nothing answers there


@pytest.fixture
def bench(tmp_path: Path) -> Iterator[tuple[Daemon, Path]]:
    config, _ = write_bench(tmp_path)
    d = start_daemon(config, tmp_path)
    yield d, config
    d.stop()
    assert "Traceback" not in d.log.read_text()


def cli(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", *args], capture_output=True, text=True, timeout=120, env=env
    )


def ep(d: Daemon) -> list[str]:
    return ["--endpoint", d.endpoint, "--telemetry", d.pub]


# ---------------------------------------------------------------- 1. the demo and example scripts


def test_demo_refuses_a_port_held_by_another_daemon(bench: tuple[Daemon, Path]) -> None:
    """With another daemon already on the port the demo is told to use, the demo refuses to run
    and that daemon is left exactly as it was: never armed, no command from the demo journaled."""
    decoy, _ = bench
    with decoy.client() as mw:
        events_before = mw.events(since=0, limit=1000)
    env = dict(os.environ, MESHWARDEN_DEMO_ENDPOINT=decoy.endpoint)
    result = subprocess.run(
        [sys.executable, str(REPO / "scripts" / "demo_run.py")], capture_output=True, text=True, timeout=180, env=env
    )
    assert result.returncode == 2, result.stdout + result.stderr
    assert "will not touch that one" in result.stderr and "Traceback" not in result.stderr
    with decoy.client() as mw:
        assert mw.status()["armed"] is False
        assert mw.events(since=0, limit=1000) == events_before


def test_route_light_will_not_arm_a_rack_it_was_not_written_for(bench: tuple[Daemon, Path]) -> None:
    """The example script checks the run token and the rack before arming; a wrong token, other
    boards, or a latched emergency stop each leave the daemon disarmed (and the estop latched)."""
    decoy, _ = bench
    script = [sys.executable, str(REPO / "scripts" / "route_light.py"), "--endpoint", decoy.endpoint]
    wrong_token = subprocess.run(
        [*script, "--expect-token", "not-this-one"], capture_output=True, text=True, timeout=60
    )
    assert wrong_token.returncode == 2 and "not arming" in wrong_token.stderr
    other_boards = subprocess.run(script, capture_output=True, text=True, timeout=60)  # expects the demo's b0,b1
    assert other_boards.returncode == 2 and "drives boards b0, not b0,b1" in other_boards.stderr
    with decoy.client() as mw:
        mw.estop("someone else's stop")
    latched = subprocess.run([*script, "--expect-boards", "b0"], capture_output=True, text=True, timeout=60)
    assert latched.returncode == 2 and "will not clear someone's emergency stop" in latched.stderr
    with decoy.client() as mw:
        status = mw.status()
    assert status["armed"] is False and status["estopped"] is True


# ---------------------------------------------------------------- 2. and 3. what stays live, said where the user is


def test_status_and_shutdown_say_what_stays_live(tmp_path: Path) -> None:
    """`status` reports outputs live and the highest volts; stopping while a channel is live prints
    and journals it with what the board watchdog will do and when; start-up says disarmed, the
    watchdog plan and the design-nominal calibration."""
    config, _ = write_bench(tmp_path)
    d = start_daemon(config, tmp_path)
    try:
        with d.client() as mw:
            assert mw.status()["outputs_live"] == {"count": 0, "highest_volts": 0.0}
            mw.arm()
            mw.set({"c0": 10.0}, volts=True)
            live = mw.status()["outputs_live"]
        # 16-bit DAC, 60 V full scale: one code is 60/65536 V (common practice: an ideal DAC's LSB)
        assert live["count"] == 1 and live["highest_volts"] == pytest.approx(10.0, abs=60 / 65536)
        table = cli("status", *ep(d)).stdout
        assert "outputs live: 1, highest 10.00 V" in table
    finally:
        assert d.stop() == 0
    log = d.log.read_text()
    assert "started DISARMED" in log and "design-nominal calibration" in log
    assert "stopping with outputs LIVE - outputs live: 1, highest 10.00 V (b0: 1)" in log
    assert "board b0: its watchdog ramps every output to zero 30 s after the last heartbeat" in log
    with Journal(tmp_path / "journal.sqlite") as journal:
        (event,) = journal.events(kind="shutdown")
    assert event.detail["live_outputs"] == 1 and event.detail["policy"] == "hold"


def test_arm_prints_a_caution(bench: tuple[Daemon, Path]) -> None:
    """`arm` says in one line that outputs may now rise and to keep clear of probes; tables, not dicts."""
    d, _ = bench
    out = cli("arm", *ep(d)).stdout
    assert "caution: outputs may now rise to their limits" in out and "keep clear of probes" in out
    assert "{" not in out


# ---------------------------------------------------------------- 5. value now, target apart


def test_get_reports_what_each_table_reaches_within_the_limit(bench: tuple[Daemon, Path]) -> None:
    """`get` gives each actuator's reachable range: its calibration file's value at 0 V and at
    the last of its volts within the limit (the bench's tables end at 40 V, the coupler limit)."""
    d, config = bench
    with d.client() as mw:
        view = mw.get()["actuators"]
    table = yaml.safe_load((config.parent / "cal" / "c0.yaml").read_text(encoding="utf-8"))
    assert table["volts"][-1] == 40.0
    assert view["c0"]["reachable"] == pytest.approx([table["values"][0], table["values"][-1]], abs=1e-9)


def test_value_is_what_outputs_mean_now_and_target_is_apart(bench: tuple[Daemon, Path]) -> None:
    """After a set, value and target agree; after disarm, value is null at 0 V (never a stale 0.4),
    and target is the journal's last target."""
    d, _ = bench
    with d.client() as mw:
        mw.arm()
        mw.set({"c0": 0.4})
        c0 = mw.get()["actuators"]["c0"]
        assert c0["value"] == 0.4 and c0["target"]["value"] == 0.4 and c0["target"]["volts"] == c0["volts"]
        mw.disarm()
        c0 = mw.get()["actuators"]["c0"]
    assert c0["volts"] == 0.0 and c0["value"] is None
    assert c0["target"] == {"volts": 0.0, "value": None, "calibration_version": c0["calibration_version"]}


# ---------------------------------------------------------------- 6. timeouts, Ctrl-C, unreachable


@pytest.mark.parametrize("command", [["set", "c0=0.3"], ["disarm"], ["restore"], ["status"]])
def test_an_absent_daemon_is_reported_unreachable(command: list[str]) -> None:
    """Every command, the long ones too, reports an absent daemon as unreachable (exit 3)."""
    result = cli(*command, "--endpoint", DEAD, "--timeout", "0.3")
    assert result.returncode == 3 and "unreachable" in result.stderr and "Traceback" not in result.stderr


def test_estop_without_a_daemon_says_what_the_watchdogs_do(tmp_path: Path) -> None:
    """An estop that cannot be delivered says so, and what each board's watchdog will do and when."""
    config, _ = write_bench(tmp_path)
    result = cli("estop", "--endpoint", DEAD, "--timeout", "0.3", "--config", str(config))
    assert result.returncode == 3
    assert "the emergency stop was NOT delivered" in result.stderr
    assert "board b0: its watchdog ramps every output to zero 30 s after the last heartbeat" in result.stderr


def test_ctrl_c_on_set_cancels_the_ramp_and_says_where_outputs_ended(tmp_path: Path) -> None:
    """SIGINT during `set` stops the daemon's ramp between steps (the job ends cancelled) and the
    command prints where the output ended, which is what the daemon reports, below the target."""
    config, _ = write_bench(tmp_path, dwell="200 ms")  # 19 steps of 2 V: a ramp of several seconds
    d = start_daemon(config, tmp_path)
    try:
        with d.client() as mw:
            mw.arm()
            proc = subprocess.Popen(
                [sys.executable, "-m", "meshwarden.cli", "set", "c0=38 V", *ep(d)],
                stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                text=True,
            )
            for _ in range(600):
                if any(j["state"] == "running" for j in mw.jobs()):
                    break
                time.sleep(0.01)
            proc.send_signal(signal.SIGINT)
            out, err = proc.communicate(timeout=60)
            job = mw.jobs()[-1]
            c0 = mw.get()["actuators"]["c0"]
    finally:
        d.stop()
    assert proc.returncode == 130, out + err
    assert job["state"] == "cancelled" and f"{job['id']}: cancelled" in out
    assert "outputs ended at:" in out
    assert c0["volts"] < 38.0
    row = next(line for line in out.splitlines() if line.split()[:1] == ["c0"])
    assert float(row.split()[3]) == pytest.approx(c0["volts"], abs=1e-4)


# ---------------------------------------------------------------- the commands for what the bus has


def test_bus_commands_from_the_command_line(bench: tuple[Daemon, Path]) -> None:
    """events, jobs, cancel, lease/release (by client id), watch, monitors --integration."""
    d, _ = bench
    assert cli("arm", *ep(d)).returncode == 0
    assert cli("set", "g0.kappa=0.3", *ep(d)).returncode == 0
    events = cli("events", "--json", *ep(d))
    assert any(e["kind"] == "arm" for e in json.loads(events.stdout))
    jobs = json.loads(cli("jobs", "--json", *ep(d)).stdout)
    assert jobs[-1]["state"] == "done"
    assert "not running" in cli("cancel", jobs[-1]["id"], *ep(d)).stdout
    lease = cli("lease", "g0", "--client-id", "bench-a", *ep(d))
    assert lease.returncode == 0 and "c0, p0" in lease.stdout
    refused = cli("set", "c0=0.2", "--client-id", "bench-b", *ep(d))
    assert refused.returncode == 1 and "lease" in refused.stderr
    assert cli("release", "g0", "--client-id", "bench-a", *ep(d)).returncode == 0
    assert cli("set", "c0=0.2", "--client-id", "bench-b", *ep(d)).returncode == 0
    watched = cli("watch", "heartbeat", "--count", "1", "--json", *ep(d))
    assert json.loads(watched.stdout.splitlines()[0])["topic"] == "heartbeat"
    monitors = json.loads(cli("monitors", "--integration", "0.002", "--json", *ep(d)).stdout)
    assert set(monitors) == {"m0", "m1"}


def test_typo_and_duplicate_are_refused_with_their_reason(bench: tuple[Daemon, Path]) -> None:
    """A typo names the closest id; a gate attribute with its own actuator is refused; nothing moves."""
    d, _ = bench
    cli("arm", *ep(d))
    typo = cli("set", "g0.kapa=0.3", *ep(d))
    assert typo.returncode == 1 and "did you mean 'g0.kappa'?" in typo.stderr
    twice = cli("set", "g0.kappa=0.3", "c0=0.2", *ep(d))
    assert twice.returncode == 2 and "both set actuator c0" in twice.stderr
    with d.client() as mw:
        assert mw.get()["actuators"]["c0"]["volts"] == 0.0


def test_save_and_load_named_settings(bench: tuple[Daemon, Path], tmp_path: Path) -> None:
    """Saved settings come back through the guard with `load` (volts, since some actuators were
    never given a logical value); `get --json` output feeds `set --from`."""
    d, _ = bench
    cli("arm", *ep(d))
    assert cli("set", "g0.kappa=0.4", "g0.phase=1.0", *ep(d)).returncode == 0
    saved = tmp_path / "morning.json"
    assert cli("save", str(saved), *ep(d)).returncode == 0
    document = json.loads(saved.read_text(encoding="utf-8"))
    assert document["format"] == "meshwarden-settings/1" and document["actuators"]["c0"]["value"] == 0.4
    assert document["actuators"]["c0"]["calibration_version"]
    snapshot = tmp_path / "get.json"
    snapshot.write_text(cli("get", "--json", *ep(d)).stdout, encoding="utf-8")
    with d.client() as mw:
        mw.disarm()
        mw.arm()
    loaded = cli("load", str(saved), *ep(d))
    assert loaded.returncode == 0, loaded.stderr
    with d.client() as mw:
        state = mw.get()["actuators"]
        assert {a: state[a]["volts"] for a in state} == {a: e["volts"] for a, e in document["actuators"].items()}
        mw.disarm()
        mw.arm()
    assert cli("set", "--from", str(snapshot), *ep(d)).returncode == 0
    with d.client() as mw:
        assert mw.get()["actuators"]["c0"]["volts"] == document["actuators"]["c0"]["volts"]


# ---------------------------------------------------------------- small things


def test_check_config_into_a_closed_pipe_is_quiet() -> None:
    """`check-config ... | head` with the reader gone ends without a BrokenPipeError traceback."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "meshwarden.cli", "check-config", str(DEMO_CONFIG)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    assert proc.stdout is not None
    proc.stdout.close()
    _, err = proc.communicate(timeout=60)
    assert "BrokenPipeError" not in err and "Traceback" not in err


def test_check_config_lists_the_cautions() -> None:
    """check-config of the demo ends with its caution about design-nominal calibration."""
    result = cli("check-config", str(DEMO_CONFIG))
    assert result.returncode == 0
    assert "caution: 120 of 120 actuators use design-nominal calibration" in result.stdout


def test_refusals_are_published_on_the_event_topic(bench: tuple[Daemon, Path]) -> None:
    """A refused request appears on the `event` telemetry topic, as every journaled event does."""
    d, _ = bench
    with d.client() as mw:
        stream = mw.subscribe(["event"], timeout_s=5.0)
        with pytest.raises(MeshwardenError):
            mw.set({"c0": 0.3})  # disarmed: refused
        refusal = next(m for _t, m in stream if m.get("kind") == "command")
    assert refusal["ok"] is False and refusal["op"] == "set" and refusal["code"] == "not_armed"


def test_the_one_board_starting_point_is_valid(tmp_path: Path) -> None:
    """The README's starting configuration loads once its design-nominal tables are written."""
    import shutil

    from meshsim.nominal import write_nominal_tables
    from meshsim.params import parse_params
    from meshsim.scenario import load_scenario
    from meshwarden.config import load_config

    shutil.copytree(REPO / "config" / "one-board", tmp_path / "lab")
    path = tmp_path / "lab" / "lab.yaml"
    scenario = load_scenario(path)
    write_nominal_tables(scenario, parse_params(scenario.simulator), tmp_path / "lab" / "cal")
    config = load_config(path)
    assert [b.id for b in config.rack.boards] == ["b0"] and len(config.chip.gates) == 2


def test_subscribe_deadline_ends_a_busy_stream(bench: tuple[Daemon, Path]) -> None:
    """`subscribe(timeout_s=...)` is an idle timeout that a busy stream never reaches;
    `deadline_s` ends the iteration anyway, after the messages that came in time."""
    d, _ = bench
    with d.client() as mw:
        messages = list(mw.subscribe(["heartbeat"], timeout_s=5.0, deadline_s=2.5))
    assert messages and all(topic == "heartbeat" for topic, _ in messages)


def test_a_ramp_shows_a_progress_bar_on_a_terminal_and_none_in_a_pipe(tmp_path: Path) -> None:
    """With stderr on a terminal, `set` draws the ramp's progress from the job topic; with
    stderr on a pipe it writes no bar."""
    import pty

    config, _ = write_bench(tmp_path, dwell="100 ms")  # 19 steps: progress messages to draw
    d = start_daemon(config, tmp_path)
    master, slave = pty.openpty()
    try:
        with d.client() as mw:
            mw.arm()
        proc = subprocess.run(
            [sys.executable, "-m", "meshwarden.cli", "set", "c0=38 V", *ep(d)],
            stdout=subprocess.PIPE,
            stderr=slave,
            text=True,
            timeout=120,
        )
        os.close(slave)
        slave = -1
        drawn = b""
        while True:
            try:
                chunk = os.read(master, 65536)
            except OSError:
                break
            if not chunk:
                break
            drawn += chunk
        piped = cli("set", "c0=0 V", *ep(d))
    finally:
        os.close(master)
        if slave >= 0:
            os.close(slave)
        d.stop()
    assert proc.returncode == 0
    assert b"\rjob-1 ramping 1 output(s) [" in drawn and b"100%" in drawn
    assert piped.returncode == 0 and "[" not in piped.stderr


def test_a_margin_override_is_journaled_and_announced_at_start(tmp_path: Path) -> None:
    """A daemon started on a configuration with a thin-margin override journals it (with the
    measured pull-in it names) and says it loudly at start."""
    config, _ = write_bench(tmp_path, margin=0.03, coupler_limit=48)
    d = start_daemon(config, tmp_path)
    assert d.stop() == 0
    with Journal(tmp_path / "journal.sqlite") as journal:
        (event,) = journal.events(kind="margin_override")
    assert event.detail["margin"] == 0.03 and event.detail["measured_pull_in"] == "the simulated chip's own pull-in"
    log = d.log.read_text()
    assert "WARNING: pull-in margin 0.03 is below the usual minimum by override" in log
    assert "WARNING: limits within 5% of pull-in: c0, c1" in log


def test_a_stored_calibration_that_no_longer_fits_names_the_way_out(tmp_path: Path) -> None:
    """When the active calibration version no longer fits the configuration (here a phase table
    stored for a coupler), the daemon refuses to start with a message that says why and how to
    start on another version, and `serve --calibration config` then starts on the configuration's
    own tables and makes that the active choice."""
    config, _ = write_bench(tmp_path)
    version = tmp_path / "calibration" / "versions" / "20260101T000000Z"
    version.mkdir(parents=True)
    (version / "manifest.yaml").write_text("{}\n", encoding="utf-8")
    (version / "c0.yaml").write_text((tmp_path / "cal" / "p0.yaml").read_text(encoding="utf-8"), encoding="utf-8")
    (tmp_path / "calibration" / "active").write_text("20260101T000000Z\n", encoding="utf-8")
    result = cli("serve", "--config", str(config), "--bind", "tcp://127.0.0.1:9", "--pub", "tcp://127.0.0.1:9")
    assert result.returncode == 2, result.stdout + result.stderr
    assert "'20260101T000000Z' cannot be used" in result.stderr and "table c0 does not fit" in result.stderr
    assert "serve --calibration VERSION" in result.stderr and "Traceback" not in result.stderr
    d = start_daemon(config, tmp_path, "--calibration", "config")
    try:
        with d.client() as mw:
            assert mw.status()["armed"] is False
    finally:
        assert d.stop() == 0
    assert (tmp_path / "calibration" / "active").read_text(encoding="utf-8").strip() == "config"
    result = cli("serve", "--config", str(config), "--calibration", "nosuch", "--bind", "tcp://127.0.0.1:9")
    assert result.returncode == 2 and "no calibration version 'nosuch'" in result.stderr
