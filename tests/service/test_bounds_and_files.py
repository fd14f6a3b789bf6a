"""Bounds and files of the bus: the reply cache's byte and count limits, the loopback rule, key and
journal file modes, the start-up checks that run before any board link, finished jobs."""

from __future__ import annotations

import asyncio
import gc
import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from meshwarden.client import Client
from meshwarden.config import load_config
from meshwarden.config.checks import is_loopback
from meshwarden.errors import BusError, ConfigError, MeshwardenError
from meshwarden.journal import Journal
from meshwarden.service.bus import write_keypair
from meshwarden.service.daemon import serve
from meshwarden.service.jobs import KEEP_FINISHED, Jobs
from meshwarden.service.replies import ENTRY_OVERHEAD_BYTES, PER_CLIENT, ReplyCache, request_digest
from meshwarden.testing import RecordingDriver
from tests.config.minimal import MAIN, replace_line, write_config


def mode_of(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


# ---------------------------------------------------------------------- reply cache


def fill(cache: ReplyCache, identity: str, client: str, request_id: str, reply: bytes) -> None:
    cache.add((identity, client, request_id), request_digest("events", {"n": request_id}))
    cache.settle((identity, client, request_id), reply)


def test_reply_cache_stays_within_its_byte_bound_evicting_the_heaviest_identity() -> None:
    """A flood of large replies from one identity over many client ids keeps the cache within
    its byte bound, and evicts the flooder's own entries, not another identity's small one."""

    async def run() -> None:
        cache = ReplyCache(max_bytes=1 << 20)
        fill(cache, "ada", "notebook", "set-1", b"x" * 300)
        for i in range(2000):
            fill(cache, "eve", f"client-{i % 48}", f"r-{i}", b"y" * 60_000)
            assert cache.size <= 1 << 20
        assert cache.get(("ada", "notebook", "set-1"), request_digest("events", {"n": "set-1"})) is not None
        assert cache.get(("eve", "client-0", "r-0"), request_digest("events", {"n": "r-0"})) is None  # evicted
        kept_floods = len(cache) - 1
        assert cache.size == kept_floods * (60_000 + ENTRY_OVERHEAD_BYTES) + 300 + ENTRY_OVERHEAD_BYTES

    asyncio.run(run())


def test_reply_cache_bounds_entries_per_client() -> None:
    """Each (identity, client) keeps its newest PER_CLIENT entries."""

    async def run() -> None:
        cache = ReplyCache(max_bytes=1 << 30)
        for i in range(PER_CLIENT + 10):
            fill(cache, "local", "one", f"r-{i}", b"{}")
        assert len(cache) == PER_CLIENT
        assert cache.get(("local", "one", "r-9"), request_digest("events", {"n": "r-9"})) is None
        assert cache.get(("local", "one", "r-10"), request_digest("events", {"n": "r-10"})) is not None

    asyncio.run(run())


def test_reply_cache_refuses_a_reused_id_with_another_request() -> None:
    """The same key with a different digest is refused with bad_request."""

    async def run() -> None:
        cache = ReplyCache(max_bytes=1 << 20)
        fill(cache, "local", "one", "r-1", b"{}")
        with pytest.raises(BusError, match="request id reused with a different request") as err:
            cache.get(("local", "one", "r-1"), request_digest("events", {"n": "other"}))
        assert err.value.code == "bad_request"
        assert cache.get(("local", "two", "r-1"), request_digest("events", {"n": "other"})) is None

    asyncio.run(run())


def test_reply_cache_byte_bound_is_a_configuration_key(tmp_path: Path) -> None:
    """`service.reply_cache_bytes` is read, with a documented default of 32 MiB."""
    assert load_config(write_config(tmp_path / "a", MAIN)).service.reply_cache_bytes == 32 << 20
    text = MAIN.replace("journal:", "service:\n  reply_cache_bytes: 2097152\njournal:")
    assert load_config(write_config(tmp_path / "b", text)).service.reply_cache_bytes == 2 << 20


# ---------------------------------------------------------------------- loopback


@pytest.mark.parametrize(
    ("endpoint", "local"),
    [
        ("tcp://127.0.0.1:7640", True),
        ("tcp://127.3.4.5:7640", True),
        ("tcp://localhost:7640", True),
        ("tcp://[::1]:7640", True),
        ("tcp://127.0.0.1:*", True),
        ("ipc:///run/meshwarden/cmd", True),
        ("tcp://127.example.org:7640", False),
        ("tcp://0.0.0.0:7640", False),
        ("tcp://*:7640", False),
        ("tcp://eth0:7640", False),
        ("tcp://10.0.0.5:7640", False),
        ("tcp://[::]:7640", False),
        ("tcp://127.0.0.1", False),
        ("ws://127.0.0.1:7640", False),
        ("pgm://eth0;239.192.1.1:5555", False),
        ("udp://127.0.0.1:7640", False),
        ("inproc://x", False),
        ("127.0.0.1:7640", False),
        ("ipc://", False),
    ],
)
def test_only_parsed_loopback_endpoints_count_as_local(endpoint: str, local: bool) -> None:
    """tcp on 127.0.0.0/8, ::1 or localhost and ipc paths are local; everything else needs CURVE."""
    assert is_loopback(endpoint) is local


def recording_config(tmp_path: Path) -> Path:
    text = replace_line("      url: socket://127.0.0.1:9", "      url: none://\n      driver: recording", MAIN)
    return write_config(tmp_path, text)


def test_an_exposed_endpoint_is_refused_before_any_board_link_opens(tmp_path: Path) -> None:
    """Without CURVE, `serve` on a non-loopback endpoint fails before a board driver is created."""
    config = load_config(recording_config(tmp_path))
    RecordingDriver.boards.pop("b0", None)
    with pytest.raises(ConfigError, match="beyond loopback"):
        asyncio.run(serve(config, None, "tcp://127.example.org:17999", "tcp://127.0.0.1:17998"))
    assert "b0" not in RecordingDriver.boards


# ---------------------------------------------------------------------- key and journal files


def test_keygen_writes_a_private_secret_key_whatever_the_umask(tmp_path: Path) -> None:
    """`meshwarden keygen` under umask 000 still writes the secret key 0600 (the public key may be
    read by anyone)."""
    result = subprocess.run(
        [
            sys.executable,
            "-c",
            "import os, sys; os.umask(0); from meshwarden.cli import main; sys.exit(main())",
            "keygen",
            "daemon",
            "--dir",
            str(tmp_path),
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 0, result.stderr
    assert mode_of(tmp_path / "daemon.key_secret") == 0o600
    with pytest.raises(MeshwardenError, match="already exists"):
        write_keypair(tmp_path, "daemon")  # never overwrites a key a daemon may trust


def keyed_config(tmp_path: Path) -> Path:
    keys = tmp_path / "keys"
    write_keypair(keys, "server")
    write_keypair(keys, "ops")
    text = MAIN.replace(
        "journal:",
        "service:\n  server_secret_key_file: keys/server.key_secret\n"
        "  clients:\n    - {name: ops, public_key_file: keys/ops.key, role: operator}\njournal:",
    )
    return write_config(tmp_path, text)


def test_serve_refuses_a_secret_key_others_can_read(tmp_path: Path) -> None:
    """A server secret key file readable by group or others stops `serve` at start with a clear
    message and the chmod that fixes it; nothing is opened."""
    config = keyed_config(tmp_path)
    secret = tmp_path / "keys" / "server.key_secret"
    os.chmod(secret, 0o644)
    result = subprocess.run(
        [sys.executable, "-m", "meshwarden.cli", "serve", "--config", str(config), "--bind", "tcp://127.0.0.1:17997"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 2
    assert "is open to other users (mode 0644)" in result.stderr and f"chmod 600 {secret}" in result.stderr
    assert "Traceback" not in result.stderr
    assert not (tmp_path / "journal.sqlite").exists()  # refused before the controller opened anything


def test_journal_and_its_wal_and_shm_files_are_private(tmp_path: Path) -> None:
    """The journal, and the -wal and -shm files SQLite makes beside it, are 0600 under umask 022;
    a journal left 0644 by an older version is narrowed when opened."""
    old = os.umask(0o022)
    try:
        path = tmp_path / "j" / "journal.sqlite"
        with Journal(path) as journal:
            journal.event("test", client="x")
            files = [path, path.with_name("journal.sqlite-wal"), path.with_name("journal.sqlite-shm")]
            assert all(f.exists() for f in files)
            assert [mode_of(f) for f in files] == [0o600] * 3
        os.chmod(path, 0o644)
        Journal(path).close()
        assert mode_of(path) == 0o600
    finally:
        os.umask(old)


# ---------------------------------------------------------------------- jobs


def test_finished_jobs_leave_no_tasks_behind() -> None:
    """After 10,000 short jobs only the kept finished jobs' tasks remain alive, not one per job."""

    async def run() -> int:
        async def publish(topic: str, body: dict[str, object]) -> int:
            return 0

        async def work() -> int:
            return 1

        jobs = Jobs(publish)
        for _ in range(10_000):
            jobs.start("test", "bench", work())
            await asyncio.sleep(0)
        for _ in range(5):
            await asyncio.sleep(0)
        gc.collect()
        return sum(isinstance(o, asyncio.Future) for o in gc.get_objects())

    alive = asyncio.run(run())
    assert alive <= KEEP_FINISHED + 50, alive


def test_the_client_refuses_a_secret_key_others_can_read(tmp_path: Path) -> None:
    """The client library, like the daemon, will not use a secret key file others can read."""
    write_keypair(tmp_path, "server")
    write_keypair(tmp_path, "me")
    os.chmod(tmp_path / "me.key_secret", 0o640)
    with pytest.raises(MeshwardenError, match=r"is open to other users \(mode 0640\)"):
        Client(key_file=tmp_path / "me.key_secret", server_key_file=tmp_path / "server.key")
