"""The journal: an SQLite file of every target and every event, written before the hardware moves.

Why SQLite: one file, transactional, readable with standard tools, in the standard library.
Durability: WAL mode with ``synchronous=FULL`` - every committed target is on disk (fsynced)
before the controller writes the first code of it, so a crash, a kill -9 or a power cut after
a write never leaves the journal behind the hardware. A restart reads the last target of each
actuator and the boot counter each board had, and adopts boards that still hold those codes.

Tables:
  targets(id, ts, actuator, board, channel, volts, code, value, calibration_version, request, client)
  events(id, ts, kind, board, actuator, detail, client)
  boards(board PRIMARY KEY, boot_count, serial, ts)
"""

from __future__ import annotations

import json
import os
import sqlite3
import threading
import time
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

SCHEMA_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS targets (
    id INTEGER PRIMARY KEY AUTOINCREMENT, ts REAL NOT NULL, actuator TEXT NOT NULL, board TEXT NOT NULL,
    channel INTEGER NOT NULL, volts REAL NOT NULL, code INTEGER NOT NULL, value REAL,
    calibration_version TEXT, request TEXT, client TEXT);
CREATE INDEX IF NOT EXISTS targets_by_actuator ON targets (actuator, id);
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY AUTOINCREMENT, ts REAL NOT NULL, kind TEXT NOT NULL, board TEXT, actuator TEXT,
    detail TEXT, client TEXT);
CREATE TABLE IF NOT EXISTS boards (board TEXT PRIMARY KEY, boot_count INTEGER NOT NULL, serial INTEGER, ts REAL);
"""


@dataclass(frozen=True)
class TargetRecord:
    actuator: str
    board: str
    channel: int
    volts: float
    code: int
    value: float | None
    calibration_version: str | None
    ts: float


@dataclass(frozen=True)
class EventRecord:
    id: int
    ts: float
    kind: str
    board: str | None
    actuator: str | None
    detail: dict[str, Any]
    client: str | None


def _make_private(path: Path) -> None:
    """Create the journal file mode 0600 (whatever the umask), and narrow an existing one and its
    -wal/-shm files to 0600: the journal names clients and keys. SQLite creates the -wal and
    -shm files with the database file's mode, so they are private from the start too."""
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        os.fchmod(fd, 0o600)
    finally:
        os.close(fd)
    for suffix in ("-wal", "-shm"):
        companion = path.with_name(path.name + suffix)
        if companion.exists():
            os.chmod(companion, 0o600)


class Journal:
    """One SQLite connection, shared by the controller's threads behind a lock."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        _make_private(self.path)
        self._lock = threading.Lock()
        self._db = sqlite3.connect(str(self.path), check_same_thread=False, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=FULL")
        self._db.executescript(_SCHEMA)
        self._db.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (str(SCHEMA_VERSION),))

    def close(self) -> None:
        with self._lock:
            self._db.close()

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ writing

    def record_targets(
        self, rows: Iterable[TargetRecord], request: str | None = None, client: str | None = None
    ) -> None:
        """Record targets in one transaction (committed and synced when this returns)."""
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                self._db.executemany(
                    "INSERT INTO targets (ts, actuator, board, channel, volts, code, value, calibration_version,"
                    " request, client) VALUES (?,?,?,?,?,?,?,?,?,?)",
                    [
                        (
                            r.ts,
                            r.actuator,
                            r.board,
                            r.channel,
                            r.volts,
                            r.code,
                            r.value,
                            r.calibration_version,
                            request,
                            client,
                        )
                        for r in rows
                    ],
                )
                self._db.execute("COMMIT")
            except BaseException:
                self._db.execute("ROLLBACK")
                raise

    def event(
        self,
        kind: str,
        *,
        board: str | None = None,
        actuator: str | None = None,
        client: str | None = None,
        **detail: Any,
    ) -> int:
        """Record an event; returns its id."""
        with self._lock:
            cursor = self._db.execute(
                "INSERT INTO events (ts, kind, board, actuator, detail, client) VALUES (?,?,?,?,?,?)",
                (time.time(), kind, board, actuator, json.dumps(detail, default=str, sort_keys=True), client),
            )
            return int(cursor.lastrowid or 0)

    def record_board(self, board: str, boot_count: int, serial: int | None) -> None:
        with self._lock:
            self._db.execute("INSERT OR REPLACE INTO boards VALUES (?,?,?,?)", (board, boot_count, serial, time.time()))

    # ------------------------------------------------------------------ reading

    def latest_targets(self) -> dict[str, TargetRecord]:
        """The last recorded target of every actuator."""
        with self._lock:
            rows = self._db.execute(
                "SELECT actuator, board, channel, volts, code, value, calibration_version, ts FROM targets "
                "WHERE id IN (SELECT MAX(id) FROM targets GROUP BY actuator)"
            ).fetchall()
        return {r[0]: TargetRecord(*r) for r in rows}

    def board_boot_counts(self) -> dict[str, int]:
        with self._lock:
            return {b: int(c) for b, c in self._db.execute("SELECT board, boot_count FROM boards")}

    def events(self, since_id: int = 0, kind: str | None = None, limit: int = 1000) -> list[EventRecord]:
        """Events after ``since_id``, oldest first."""
        query = "SELECT id, ts, kind, board, actuator, detail, client FROM events WHERE id > ?"
        args: list[Any] = [since_id]
        if kind is not None:
            query += " AND kind = ?"
            args.append(kind)
        query += " ORDER BY id LIMIT ?"
        args.append(limit)
        with self._lock:
            rows = self._db.execute(query, args).fetchall()
        return [EventRecord(r[0], r[1], r[2], r[3], r[4], json.loads(r[5] or "{}"), r[6]) for r in rows]

    def target_count(self) -> int:
        with self._lock:
            return int(self._db.execute("SELECT COUNT(*) FROM targets").fetchone()[0])
