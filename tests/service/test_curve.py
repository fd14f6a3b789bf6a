"""CURVE keys and roles: who may connect, and what each role may do."""

from __future__ import annotations

import os
import signal
import socket
import time
from pathlib import Path

import pytest

from meshwarden.client import Client
from meshwarden.errors import ForbiddenRefused, MeshwardenError, UnreachableError
from meshwarden.service.bus import write_keypair
from tests.control.bench import write_bench
from tests.service.daemon import Daemon, start_daemon

ROLES = {"watcher": "observer", "runner": "operator", "boss": "admin"}


def keyed_daemon(tmp_path: Path) -> tuple[Daemon, Path, Path]:
    keys = tmp_path / "keys"
    for name in ("server", "stranger", *ROLES):
        write_keypair(keys, name)
    config, _ = write_bench(tmp_path)
    clients = "".join(f"    - {{name: {n}, public_key_file: keys/{n}.key, role: {r}}}\n" for n, r in ROLES.items())
    text = config.read_text().replace(
        "journal:", f"service:\n  server_secret_key_file: keys/server.key_secret\n  clients:\n{clients}journal:"
    )
    config.write_text(text)
    return start_daemon_with_keys(config, tmp_path, keys), config, keys


def start_daemon_with_keys(config: Path, tmp_path: Path, keys: Path) -> Daemon:
    """CURVE refuses a keyless client, so the start-up probe uses the admin key."""
    return start_daemon(
        config, tmp_path, client_kwargs={"key_file": keys / "boss.key_secret", "server_key_file": keys / "server.key"}
    )


def as_(d: Daemon, keys: Path, name: str, **kw: object) -> Client:
    return Client(d.endpoint, d.pub, key_file=keys / f"{name}.key_secret", server_key_file=keys / "server.key", **kw)  # type: ignore[arg-type]


def test_roles_and_refusals(tmp_path: Path) -> None:
    """Observers read and may estop, operators set, admins arm; unknown keys, keyless clients and raw bytes get nothing."""
    d, _, keys = keyed_daemon(tmp_path)
    try:
        with as_(d, keys, "boss") as boss, as_(d, keys, "runner") as runner, as_(d, keys, "watcher") as watcher:
            assert watcher.status()["armed"] is False  # an observer may read
            with pytest.raises(ForbiddenRefused, match="needs the admin role"):
                runner.arm()
            boss.arm()
            runner.set({"c0": 0.2})  # an operator may set
            with pytest.raises(ForbiddenRefused, match="needs the operator role"):
                watcher.set({"c0": 0.1})
            assert watcher.estop("observer saw smoke") == {"b0": "zero"}  # estop is always allowed
        for name in ("stranger", None):
            kwargs: dict[str, object] = {"timeout_s": 0.3, "retries": 0}
            client = as_(d, keys, name, **kwargs) if name else Client(d.endpoint, d.pub, **kwargs)  # type: ignore[arg-type]
            with client, pytest.raises(UnreachableError):
                client.status()
        with socket.create_connection(("127.0.0.1", int(d.endpoint.rsplit(":", 1)[1]))) as raw:
            raw.sendall(b"GET / HTTP/1.0\r\n\r\n" + os.urandom(256))
            time.sleep(0.2)
        with as_(d, keys, "watcher") as watcher:
            assert watcher.status()["estopped"] is True  # the daemon shrugged off the raw bytes
    finally:
        d.stop()
    assert "Traceback" not in d.log.read_text()


def test_a_revoked_key_fails_after_reload(tmp_path: Path) -> None:
    """After SIGHUP a key removed from the allow-list is refused, per request and at the handshake."""
    d, config, keys = keyed_daemon(tmp_path)
    try:
        runner = as_(d, keys, "runner", timeout_s=0.5, retries=0)
        assert runner.status()["armed"] is False
        config.write_text(
            config.read_text().replace("    - {name: runner, public_key_file: keys/runner.key, role: operator}\n", "")
        )
        os.kill(d.proc.pid, signal.SIGHUP)
        time.sleep(0.5)
        with pytest.raises(MeshwardenError) as err:
            runner.status()  # the connection made before the reload is cut off by role
        assert err.value.code in ("forbidden", "unreachable")
        runner.close()
        with as_(d, keys, "runner", timeout_s=0.3, retries=0) as fresh, pytest.raises(UnreachableError):
            fresh.status()  # a new connection with the revoked key is refused at the handshake
        with as_(d, keys, "boss") as boss:
            assert boss.status()["armed"] is False
    finally:
        d.stop()


def test_serving_beyond_loopback_without_keys_is_refused(tmp_path: Path) -> None:
    """`--bind` cannot sidestep the configuration's rule: no keys, no listening beyond loopback."""
    import subprocess
    import sys

    config, _ = write_bench(tmp_path)
    result = subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", "serve", "--config", str(config), "--bind", "tcp://0.0.0.0:17999"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 2
    assert "beyond loopback" in result.stderr and "Traceback" not in result.stderr
