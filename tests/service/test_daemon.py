"""The daemon as a separate process on loopback sockets: client, CLI, leases, lost replies,
SIGSTOP/SIGCONT, kill -9 and restart."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import zmq

from meshwarden.client import Client
from meshwarden.errors import LeaseRefused, MeshwardenError, NotArmedRefused, UnknownTargetRefused, UnreachableError
from tests.control.bench import write_bench
from tests.service.daemon import Daemon, start_daemon
from tests.sim.test_transports import start_server, stop_server


def cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "meshwarden.cli", *args], capture_output=True, text=True, timeout=60)


def test_client_end_to_end(daemon: Daemon) -> None:
    """Arm, set gates, read back, read monitors, estop - through the client library."""
    with daemon.client() as mw:
        assert mw.status()["armed"] is False
        with pytest.raises(NotArmedRefused):
            mw.set({"c0": 0.3})
        mw.arm()
        applied = mw.set({"g0.kappa": 0.5, "g0.phase": 1.0})
        assert set(applied["applied"]) == {"c0", "p0"}
        state = mw.get()
        assert state["armed"] and state["actuators"]["c0"]["value"] == 0.5
        monitors = mw.monitors(average=2)
        assert set(monitors) == {"m0", "m1"} and all(m["watts"] >= 0 for m in monitors.values())
        with pytest.raises(UnknownTargetRefused):
            mw.set({"nope": 1.0})
        assert mw.estop("test") == {"b0": "zero"}
        assert mw.get()["actuators"]["c0"]["code"] == 0
        kinds = [e["kind"] for e in mw.events(since=0, limit=1000)]
        assert "estop" in kinds and "arm" in kinds


def test_cli_exit_codes_and_json(daemon: Daemon) -> None:
    """0 ok, 1 refused by the daemon, 2 usage, 3 unreachable; get --json has the documented keys."""
    ep = ["--endpoint", daemon.endpoint]
    assert cli("status", *ep).returncode == 0
    refused = cli("set", "c0=0.3", *ep)
    assert refused.returncode == 1 and "not_armed" in refused.stderr
    assert cli("set", "c0=high", *ep).returncode == 2
    assert cli("arm", *ep).returncode == 0
    assert cli("set", "g0.kappa=0.4", "p1=1.5", *ep).returncode == 0
    got = json.loads(cli("get", "--json", *ep).stdout)
    assert {"armed", "estopped", "actuators"} <= set(got)
    assert set(got["actuators"]["c0"]) >= {"kind", "board", "channel", "volts", "code", "limit_v", "value"}
    monitors = json.loads(cli("monitors", "--json", *ep).stdout)
    assert set(monitors["m0"]) == {"amps", "watts", "counts"}
    assert cli("set", "c0=30", "--volts", *ep).returncode == 0
    assert cli("set", "c0=45", "--volts", *ep).returncode == 1
    unreachable = cli("status", "--endpoint", "tcp://127.0.0.1:9", "--timeout", "0.2", "--retries", "0")
    assert unreachable.returncode == 3 and "Traceback" not in unreachable.stderr
    assert cli("estop", *ep).returncode == 0


def test_leases_between_two_clients(daemon: Daemon) -> None:
    """A lease holder's actuators refuse other clients' writes until it releases or vanishes."""
    with daemon.client(client_id="alice") as alice, daemon.client(client_id="bob") as bob:
        alice.arm()
        alice.lease(["g0"], ttl_s=1.0)
        with pytest.raises(LeaseRefused, match="leased by 'alice@local'"):
            bob.set({"c0": 0.2})
        alice.set({"c0": 0.2})
        bob.set({"c1": 0.2})  # not leased
        assert bob.estop()["b0"] == "zero"  # estop ignores leases
        alice.arm()
    time.sleep(1.2)  # alice is gone; her lease expires
    with daemon.client(client_id="bob") as bob:
        bob.set({"c0": 0.2})


def test_lost_reply_is_answered_from_the_cache_and_applied_once(daemon: Daemon) -> None:
    """A set whose reply is lost: the resend (same client and request id) gets the same reply,
    and the daemon ran the command once."""
    with daemon.client() as mw:
        mw.arm()
    request = json.dumps(
        {"v": 1, "id": "once-1", "client": "lossy", "op": "set", "args": {"values": {"c0": 20.0}, "volts": True}}
    ).encode()
    ctx = zmq.Context.instance()
    first = ctx.socket(zmq.DEALER)
    first.setsockopt(zmq.LINGER, 2000)  # the request still goes out ...
    first.connect(daemon.endpoint)
    first.send(request)
    first.close()  # ... but the socket is gone before the ramp ends and its reply comes back
    time.sleep(1.0)
    second = ctx.socket(zmq.DEALER)
    second.connect(daemon.endpoint)
    second.send(request)
    assert second.poll(5000)
    reply = json.loads(second.recv())
    second.close(0)
    assert reply["ok"] and reply["id"] == "once-1"
    with daemon.client() as mw:
        time.sleep(0.2)
        undeliverable = [e for e in mw.events(limit=1000) if e["kind"] == "reply_undeliverable"]
        sets = [j for j in mw.jobs() if j["kind"] == "set"]
        commands = [
            e for e in mw.events(limit=1000) if e["kind"] == "command" and e["detail"].get("request") == "once-1"
        ]
    assert len(sets) == 1 and len(commands) == 1
    assert undeliverable  # ROUTER_MANDATORY: the reply to the vanished socket was noticed, not lost silently


def test_sigstop_then_sigcont(daemon: Daemon) -> None:
    """A stopped daemon is reported unreachable within timeout x (retries + 1); after SIGCONT the
    same client carries on."""
    with daemon.client(timeout_s=0.3, retries=1) as mw:
        mw.status()
        os.kill(daemon.proc.pid, signal.SIGSTOP)
        try:
            started = time.monotonic()
            with pytest.raises(UnreachableError):
                mw.status()
            assert time.monotonic() - started < 0.3 * 2 + 1.0  # generous: a loaded machine answers late
        finally:
            os.kill(daemon.proc.pid, signal.SIGCONT)
        assert mw.status()["armed"] is False


def test_kill_9_and_restart_adopts_without_writes(tmp_path: Path) -> None:
    """With the rack in its own process (ptys), a killed daemon's successor adopts the outputs:
    same codes, an 'adopted' event, disarmed; clients reconnect by themselves."""
    config, _ = write_bench(tmp_path)
    sim, ports = start_server(tmp_path, "pty", config=config)
    try:
        first = start_daemon(config, tmp_path, ports=ports)
        client = Client(first.endpoint, first.pub, timeout_s=1.0, retries=10)
        client.arm()
        client.set({"c0": 12.0, "p1": 8.0}, volts=True)
        codes = {a: v["code"] for a, v in client.get()["actuators"].items()}
        first.proc.kill()
        first.proc.wait()
        second = start_daemon(config, tmp_path, ports=ports, endpoint=first.endpoint)
        try:
            state = client.get()  # the same client object, reconnected
            assert state["armed"] is False
            assert {a: v["code"] for a, v in state["actuators"].items()} == codes
            assert any(e["kind"] == "adopted" for e in client.events(limit=1000))
        finally:
            client.close()
            assert second.stop() == 0
    finally:
        stop_server(sim)


def test_a_ramp_is_a_job_with_progress_on_telemetry(daemon: Daemon) -> None:
    """A long set returns a job id at once (wait=false); its progress and end come on the `job`
    topic; status is served meanwhile."""
    with daemon.client() as mw:
        mw.arm()
        stream = mw.subscribe(["job"], timeout_s=10)
        started = mw.set({"c0": 30.0, "c1": 30.0}, volts=True, wait=False)
        assert started["state"] == "running"
        assert mw.status()["armed"]  # not blocked by the ramp
        progress, final = [], None
        for _, message in stream:
            if message["job"] != started["job"]:
                continue
            if "progress" in message:
                progress.append(message["progress"])
            if message["state"] != "running":
                final = message
                break
    assert final is not None and final["state"] == "done"
    assert progress and progress == sorted(progress) and progress[-1] == 1.0


def test_a_taken_port_is_a_clear_error(daemon: Daemon, tmp_path: Path) -> None:
    """A second daemon on the same endpoint says which endpoint is taken, exit 2, no traceback."""
    config, _ = write_bench(tmp_path / "second")
    result = subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", "serve", "--config", str(config), "--bind", daemon.endpoint],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 2
    assert f"cannot listen on {daemon.endpoint}" in result.stderr and "Traceback" not in result.stderr


@pytest.mark.parametrize(("policy", "expect_zero"), [("hold", False), ("ramp_to_zero", True)])
def test_sigterm_shutdown_policy(tmp_path: Path, policy: str, expect_zero: bool) -> None:
    """SIGTERM stops the daemon cleanly (exit 0); `hold` leaves the outputs for the next start to
    adopt, `ramp_to_zero` disarms on the way out - observed at the simulated board."""
    from meshsim.rack import SimRack
    from meshsim.serve import RackServer

    config, _ = write_bench(tmp_path)
    rack = SimRack.from_config(config)
    with RackServer(rack, "pty") as server:
        d = start_daemon(config, tmp_path, "--shutdown", policy, ports=server.ports())
        with d.client() as mw:
            mw.arm()
            mw.set({"c0": 10.0}, volts=True)
        code_before = int(rack.board("b0").codes[0])
        assert code_before > 0
        assert d.stop() == 0
        assert (int(rack.board("b0").codes[0]) == 0) is expect_zero
        assert "Traceback" not in d.log.read_text()


def test_monitor_acquisition_is_bounded(daemon: Daemon) -> None:
    """A monitor request that would hold the boards' links for more than 10 s is refused whole."""
    with daemon.client() as mw:
        with pytest.raises(MeshwardenError) as err:
            mw.monitors(average=100, integration_s=0.5)
        assert err.value.code == "out_of_range" and "at most 10 s" in err.value.message
        assert set(mw.monitors(average=3, integration_s=0.01)) == {"m0", "m1"}


def test_a_running_ramp_can_be_cancelled(daemon: Daemon) -> None:
    """Cancelling a ramp job stops it at its next step: the job ends cancelled, the output stays
    where the last step left it (below the target), and the daemon stays armed."""
    with daemon.client() as mw:
        mw.arm()
        started = mw.set({"c0": 38.0}, volts=True, wait=False)
        time.sleep(0.01)
        assert mw.cancel(started["job"])["cancelled"] is True
        time.sleep(0.2)
        job = next(j for j in mw.jobs() if j["id"] == started["job"])
        state = mw.get()
    assert job["state"] == "cancelled"
    assert 0 <= state["actuators"]["c0"]["volts"] < 38.0 and state["armed"]
