"""Start `meshwarden serve` as a separate process on free loopback ports, as a user would."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from meshwarden.client import Client
from meshwarden.errors import UnreachableError
from meshwarden.testing import free_port


@dataclass
class Daemon:
    proc: subprocess.Popen[bytes]
    endpoint: str
    pub: str
    log: Path
    client_kwargs: dict[str, Any] = field(default_factory=dict)  # e.g. CURVE key files

    def client(self, **kwargs: Any) -> Client:
        return Client(self.endpoint, self.pub, **{**self.client_kwargs, **kwargs})

    def stop(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        return int(self.proc.returncode)


def start_daemon(
    config: Path,
    log_dir: Path,
    *extra: str,
    ports: dict[str, str] | None = None,
    endpoint: str | None = None,
    client_kwargs: dict[str, Any] | None = None,
) -> Daemon:
    """Start the daemon and wait until it answers ``status``. A port found free can be taken by
    another process before the daemon binds it (the OS hands out the same range to outgoing
    connections): a daemon that exits saying so is started again on other ports, twice at most."""
    for attempt in range(3):
        bind = endpoint or f"tcp://127.0.0.1:{free_port()}"
        daemon = _launch(config, log_dir, extra, ports, bind, f"tcp://127.0.0.1:{free_port()}", client_kwargs or {})
        failure = _failure_to_answer(daemon)
        if failure is None:
            return daemon
        if "in use" not in failure.lower() or endpoint is not None or attempt == 2:
            raise RuntimeError(failure)
    raise AssertionError("unreachable")


def _launch(
    config: Path,
    log_dir: Path,
    extra: tuple[str, ...],
    ports: dict[str, str] | None,
    endpoint: str,
    pub: str,
    client_kwargs: dict[str, Any],
) -> Daemon:
    args = [
        sys.executable,
        "-m",
        "meshwarden.cli",
        "--log-format",
        "json",
        "serve",
        "--config",
        str(config),
        "--bind",
        endpoint,
        "--pub",
        pub,
        *extra,
    ]
    if ports is not None:
        import json

        ports_file = log_dir / "ports.json"
        ports_file.write_text(json.dumps(ports))
        args += ["--ports-file", str(ports_file)]
    log = log_dir / f"daemon-{time.monotonic_ns()}.log"
    with log.open("wb") as out:
        proc = subprocess.Popen(
            args, stdout=out, stderr=subprocess.STDOUT, cwd=Path(__file__).resolve().parents[2], env=dict(os.environ)
        )
    return Daemon(proc, endpoint, pub, log, client_kwargs)


def _failure_to_answer(daemon: Daemon) -> str | None:
    """None once the daemon answers ``status``; else why not (it is stopped then). Waits in short
    steps, so that a daemon that exited is seen at once."""
    try:
        with daemon.client() as probe:
            deadline = time.monotonic() + 30.0
            while True:
                try:
                    probe.wait_ready(1.0)
                    break
                except UnreachableError:
                    if daemon.proc.poll() is not None or time.monotonic() > deadline:
                        raise
    except UnreachableError:
        daemon.stop()
        return f"daemon did not answer: {daemon.log.read_text()}"
    if daemon.proc.poll() is not None:
        return f"daemon exited: {daemon.log.read_text()}"
    return None
