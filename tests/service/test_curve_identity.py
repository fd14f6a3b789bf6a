"""Under CURVE the authenticated key, not the client string, holds leases, owns cached replies and
is journaled."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import zmq

from meshwarden.client import Client
from meshwarden.errors import LeaseRefused
from meshwarden.service.bus import write_keypair
from tests.control.bench import write_bench
from tests.service.daemon import Daemon
from tests.service.test_curve import start_daemon_with_keys

KEYS = {"ada": "operator", "ben": "operator", "boss": "admin"}


def two_operators(tmp_path: Path) -> tuple[Daemon, Path]:
    keys = tmp_path / "keys"
    for name in ("server", *KEYS):
        write_keypair(keys, name)
    config, _ = write_bench(tmp_path)
    clients = "".join(f"    - {{name: {n}, public_key_file: keys/{n}.key, role: {r}}}\n" for n, r in KEYS.items())
    config.write_text(
        config.read_text().replace(
            "journal:", f"service:\n  server_secret_key_file: keys/server.key_secret\n  clients:\n{clients}journal:"
        )
    )
    return start_daemon_with_keys(config, tmp_path, keys), keys


def as_key(d: Daemon, keys: Path, name: str, client_id: str) -> Client:
    return Client(
        d.endpoint,
        d.pub,
        key_file=keys / f"{name}.key_secret",
        server_key_file=keys / "server.key",
        client_id=client_id,
    )


def test_a_second_key_cannot_use_the_first_ones_lease_by_copying_its_client_id(tmp_path: Path) -> None:
    """Ben sends Ada's client id: he may neither set her leased actuator nor release her lease;
    the lease, the status table and the journal name Ada's key."""
    d, keys = two_operators(tmp_path)
    try:
        with as_key(d, keys, "boss", "console") as boss:
            boss.arm()
        with as_key(d, keys, "ada", "shared-id") as ada, as_key(d, keys, "ben", "shared-id") as ben:
            assert ada.lease(["g0"], ttl_s=60)["holder"] == "ada"
            with pytest.raises(LeaseRefused, match="leased by 'ada'"):
                ben.set({"c0": 0.2})
            with pytest.raises(LeaseRefused, match="leased by 'ada'"):
                ben.release(["g0"])
            assert ben.status()["leases"] == {"c0": "ada", "p0": "ada"}
            ada.set({"c0": 0.2})  # the holder still may
            events = ada.events(limit=1000)
        leases = [e for e in events if e["kind"] == "command" and e["detail"].get("op") == "lease"]
        assert [(e["client"], e["detail"]["label"]) for e in leases] == [("ada", "shared-id")]
        refused = [e for e in events if e["kind"] == "command" and e["detail"].get("code") == "lease"]
        assert {e["client"] for e in refused} == {"ben"}
    finally:
        d.stop()
    assert "Traceback" not in d.log.read_text()


def test_cached_replies_belong_to_the_key_that_asked(tmp_path: Path) -> None:
    """The same client and request id from another key is a new request for that key: it is not
    answered with (or refused by) the first key's cached reply."""
    d, keys = two_operators(tmp_path)
    try:
        request = {"v": 1, "id": "r-1", "client": "same", "op": "lease", "args": {"targets": ["g1"], "ttl_s": 60}}
        replies = {}
        for name in ("ada", "ben"):
            sock: zmq.Socket[bytes] = zmq.Context.instance().socket(zmq.DEALER)
            sock.setsockopt(zmq.LINGER, 0)
            public, secret = zmq.auth.load_certificate(str(keys / f"{name}.key_secret"))
            server, _ = zmq.auth.load_certificate(str(keys / "server.key"))
            assert secret is not None
            sock.curve_publickey, sock.curve_secretkey, sock.curve_serverkey = public, secret, server
            sock.connect(d.endpoint)
            sock.send(json.dumps(request).encode())
            assert sock.poll(10_000)
            replies[name] = json.loads(sock.recv())
            sock.close(0)
        assert replies["ada"]["ok"] is True and replies["ada"]["result"]["holder"] == "ada"
        assert replies["ben"]["ok"] is False and replies["ben"]["error"]["code"] == "lease"  # ran, and was refused
    finally:
        d.stop()
