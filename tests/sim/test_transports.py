"""`meshsim serve` in another process, reached over real ptys and TCP with pyserial; and in-process."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import serial

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshwarden.errors import ProtocolError
from meshwarden.protocol import Frame, encode_frame
from meshwarden.protocol import messages as m
from tests.conftest import DEMO_CONFIG
from tests.sim.helpers import BareClient


def start_server(
    tmp_path: Path, transport: str, *extra: str, config: Path = DEMO_CONFIG
) -> tuple[subprocess.Popen[str], dict[str, str]]:
    """Start `meshsim serve` in its own process; return it and its ports once they are ready."""
    ports_file = tmp_path / "ports.json"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "meshsim.cli",
            "serve",
            "--config",
            str(config),
            "--transport",
            transport,
            "--ports-file",
            str(ports_file),
            "--seed",
            "11",
            *extra,
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    deadline = time.monotonic() + 30
    while not ports_file.exists():
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            _out, err = proc.communicate()
            pytest.fail(f"meshsim serve did not start: {err}")
        time.sleep(0.05)
    return proc, json.loads(ports_file.read_text())


def stop_server(proc: subprocess.Popen[str]) -> str:
    proc.send_signal(signal.SIGTERM)
    try:
        _, err = proc.communicate(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        _, err = proc.communicate()
    return err


@pytest.fixture(params=["pty", "tcp"])
def served(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[tuple[str, dict[str, str]]]:
    proc, ports = start_server(tmp_path, request.param)
    try:
        yield request.param, ports
    finally:
        err = stop_server(proc)
        assert "Traceback" not in err, err
        assert proc.returncode == 0, err


def exercise_board(port: serial.SerialBase) -> None:
    """Every command once, then garbage and corrupted frames, then a good frame still works."""
    client = BareClient(port)
    identify = client.request(m.Identify())
    assert isinstance(identify, m.IdentifyReply) and identify.outputs == 64
    assert client.request(m.ConfigureWatchdog(30000, m.WatchdogAction.RAMP_TO_ZERO)) == m.WatchdogReply(30000, 2)
    refused = client.request(m.WriteOutputs(0, (1000, 2000, 3000)))  # freshly booted: power-on set
    assert isinstance(refused, m.Nak) and refused.reason == m.NakReason.POWERED_ON
    assert client.request(m.ClearFaults()) == m.Ack()
    written = client.request(m.WriteOutputs(0, (1000, 2000, 3000)))
    assert written == m.OutputsReply(0, (1000, 2000, 3000))
    assert client.request(m.ReadOutputs(0, 3)) == m.OutputsReply(0, (1000, 2000, 3000))
    sense = client.request(m.ReadSense(0, 3))
    assert isinstance(sense, m.SenseReply)
    assert [round(v * 1e-6, 1) for v in sense.values] == [0.9, 1.8, 2.7]
    assert client.request(m.SetMonitorGain(0, (2,) * 32)) == m.GainReply(0, (2,) * 32)
    monitors = client.request(m.ReadMonitors(0, 32, 2000))
    assert isinstance(monitors, m.MonitorsReply) and len(monitors.counts) == 32 and max(monitors.counts) > 1000
    assert isinstance(client.request(m.Heartbeat()), m.HeartbeatReply)
    status = client.request(m.Status())
    assert isinstance(status, m.StatusReply) and status.boot_count == 1
    assert client.request(m.ZeroAll()) == m.Ack()
    assert client.request(m.ReadOutputs(0, 3)) == m.OutputsReply(0, (0, 0, 0))

    client.send_raw(b"\x13\x37 line noise \xff\xfe\x00")
    corrupted = bytearray(encode_frame(Frame(1, 200, m.Command.HEARTBEAT)))
    corrupted[3] ^= 0x08
    client.send_raw(bytes(corrupted))
    naks = []
    while (item := client.receive(timeout=0.5)) is not None:
        naks.append(item)
    assert naks and all(isinstance(n, ProtocolError) or n.command == m.NAK_COMMAND for n in naks)
    assert isinstance(client.request(m.Heartbeat()), m.HeartbeatReply)
    status = client.request(m.Status())
    assert isinstance(status, m.StatusReply) and status.crc_errors + status.framing_errors >= 1


def test_every_command_over_a_separate_process(served: tuple[str, dict[str, str]]) -> None:
    """Over real ptys (and TCP sockets) opened by pyserial, a client using only the codec completes
    every command, and the firmware survives garbage and corrupted frames."""
    transport, ports = served
    assert set(ports) == {"b0", "b1"}
    if transport == "pty":
        assert all(url.startswith("/dev/pts/") for url in ports.values())
    else:
        assert all(url.startswith("socket://127.0.0.1:") for url in ports.values())
    for board in ("b0", "b1"):
        port = serial.serial_for_url(ports[board], timeout=0.2, write_timeout=2, exclusive=True, do_not_open=True)
        if transport == "pty":
            port.dsrdtr = False
            port.rtscts = False
        port.open()
        try:
            port.reset_input_buffer()
            exercise_board(port)
        finally:
            port.close()


def test_every_command_in_process() -> None:
    """The same through the in-process URL: no process, no pty."""
    url = f"meshsim://transport-test/b1?config={DEMO_CONFIG}&seed=11"
    port = serial.serial_for_url(url, timeout=0.2)
    try:
        exercise_board(port)
    finally:
        port.close()
        inprocess.remove("transport-test")


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--config", "{tmp}/none.yaml"], "cannot read"),
        (["--config", str(DEMO_CONFIG), "--faults", "melt:c00"], "unknown fault kind 'melt'"),
    ],
)
def test_serve_refuses_bad_input(tmp_path: Path, args: list[str], message: str) -> None:
    """A missing config or an unknown fault kind is one clear line and exit 2, not a traceback."""
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "meshsim.cli",
            "serve",
            *(a.format(tmp=tmp_path) for a in args),
            "--ports-file",
            str(tmp_path / "p.json"),
        ],
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert result.returncode == 2
    assert message in result.stderr and "Traceback" not in result.stderr
