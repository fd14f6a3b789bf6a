"""The journal: an SQLite file of every target and every event, written before the hardware moves.

Why SQLite: one file, transactional, readable with standard tools, in the standard library.
Durability: WAL mode with ``synchronous=FULL`` - every committed target is on disk (fsynced)
before the controller writes the first code of it, so a crash, a kill -9 or a power cut after
a write never leaves the journal behind the hardware. A restart reads the last target of each
actuator and the boot counter each board had, and adopts boards that still hold those codes.

Off the event loop: one writer thread owns the writing connection and commits in groups - all
that was queued while the previous commit was syncing goes into the next transaction, so a
burst of events costs one fsync, not one each. :meth:`Journal.event` and
:meth:`Journal.record_board` only queue (the loop never waits on the disk for them; an
emergency stop's latency does not depend on it); :meth:`Journal.record_targets_async` gives a
future that completes once the targets are durable, and the controller awaits it before the
first write of those targets. Reads use their own connection after waiting for what was queued
before them, so a reader always sees every earlier write.

An emergency stop is the one change that reaches the boards before the journal (it never waits
on the disk before zeroing). So that a crash right after it cannot leave the old targets as the
journal's last word - a restart would then offer ``restore`` to bring back what the stop took
away - the stop queues a one-row marker, :meth:`Journal.mark_all_zero_async`, before it zeroes
the boards; the marker commits while the boards are being zeroed, and every target recorded
before it reads as zero from then on (the marker's ``meta`` row holds the last target id it covers).

Tables:
  targets(id, ts, actuator, board, channel, volts, code, value, calibration_version, request, client)
  events(id, ts, kind, board, actuator, detail, client)
  boards(board PRIMARY KEY, boot_count, serial, ts)
  meta(key PRIMARY KEY, value): 'schema'; 'zeroed_through' = "<last target id> <ts>" of the last
  emergency stop's marker
"""

from __future__ import annotations

import json
import os
import queue
import sqlite3
import threading
import time
from collections.abc import Iterable
from concurrent.futures import Future
from dataclasses import dataclass, replace
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
    # Read as zero because an emergency stop's marker came after it: the code recorded before
    # (None: read as recorded). A board still holding it at a start was never reached by that stop.
    stopped_code: int | None = None


@dataclass(frozen=True)
class EventRecord:
    id: int
    ts: float
    kind: str
    board: str | None
    actuator: str | None
    detail: dict[str, Any]
    client: str | None


_Statement = tuple[str, Iterable[tuple[Any, ...]]]
_STOP = object()
GROUP_MAX = 512  # statements committed in one transaction at most
EVENT_LINGER_S = 0.002  # a batch of events alone waits this long for company before its commit


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
    """The journal file: a writer thread (group commit) and a reading connection."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        _make_private(self.path)
        self._lock = threading.Lock()
        writer = sqlite3.connect(str(self.path), check_same_thread=False, isolation_level=None)
        writer.execute("PRAGMA journal_mode=WAL")
        writer.execute("PRAGMA synchronous=FULL")
        writer.executescript(_SCHEMA)
        writer.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (str(SCHEMA_VERSION),))
        self._writer = writer
        self._db = sqlite3.connect(str(self.path), check_same_thread=False, isolation_level=None)
        self._queue: queue.SimpleQueue[tuple[object, Future[None] | None]] = queue.SimpleQueue()
        self._closed = False
        self.commits = 0  # transactions committed (a benchmark figure: fsyncs saved by grouping)
        self._thread = threading.Thread(target=self._write_loop, name="journal-writer", daemon=True)
        self._thread.start()

    def close(self) -> None:
        """Commit what is queued, stop the writer, close both connections (idempotent)."""
        if self._closed:
            return
        self._closed = True
        self._queue.put((_STOP, None))
        self._thread.join(timeout=30)
        with self._lock:
            self._db.close()
        self._writer.close()

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ the writer thread

    def _write_loop(self) -> None:
        while True:
            item, future = self._queue.get()
            batch = [(item, future)]
            while len(batch) < GROUP_MAX:
                try:
                    batch.append(self._queue.get_nowait())
                except queue.Empty:
                    if any(fut is not None for _, fut in batch):
                        break  # someone waits: commit now
                    # Only events so far: linger a moment, so that the targets a request is
                    # about to queue share their commit (one fsync, not two in a row).
                    try:
                        batch.append(self._queue.get(timeout=EVENT_LINGER_S))
                    except queue.Empty:
                        break
            stop = any(it is _STOP for it, _ in batch)
            statements: list[_Statement] = [it for it, _ in batch if isinstance(it, tuple)]
            error: BaseException | None = None
            if statements:
                try:
                    self._writer.execute("BEGIN IMMEDIATE")
                    for sql, rows in statements:
                        self._writer.executemany(sql, rows)
                    self._writer.execute("COMMIT")
                    self.commits += 1
                except BaseException as exc:  # reported to every waiter of this group
                    error = exc
                    if self._writer.in_transaction:
                        self._writer.execute("ROLLBACK")
            for _, fut in batch:
                if fut is not None and not fut.done():
                    if error is None:
                        fut.set_result(None)
                    else:
                        fut.set_exception(error)
            if stop:
                return

    def _submit(self, sql: str, rows: Iterable[tuple[Any, ...]], wait: bool) -> Future[None]:
        future: Future[None] = Future()
        if self._closed:
            future.set_exception(RuntimeError("the journal is closed"))
            return future
        self._queue.put(((sql, rows), future if wait else None))
        if not wait:
            future.set_result(None)
        return future

    def flush(self) -> None:
        """Wait until everything queued so far is committed."""
        if self._closed:
            return
        future: Future[None] = Future()
        self._queue.put((None, future))
        future.result()

    # ------------------------------------------------------------------ writing

    _TARGETS_SQL = (
        "INSERT INTO targets (ts, actuator, board, channel, volts, code, value, calibration_version,"
        " request, client) VALUES (?,?,?,?,?,?,?,?,?,?)"
    )

    def record_targets_async(
        self,
        rows: Iterable[TargetRecord],
        request: str | None = None,
        client: str | None = None,
        *,
        lazy: bool = False,
    ) -> Future[None]:
        """Queue targets; the future completes once they are committed and synced. ``lazy``: the
        rows are produced by the writer thread as it stores them (an emergency stop hands over a
        generator rather than build hundreds of records before it replies)."""
        values = (
            (r.ts, r.actuator, r.board, r.channel, r.volts, r.code, r.value, r.calibration_version, request, client)
            for r in rows
        )
        return self._submit(self._TARGETS_SQL, values if lazy else list(values), wait=True)

    def mark_all_zero_async(self) -> Future[None]:
        """Queue the marker "every output is zero from here": each target recorded before it
        reads as code 0 (its value unknown) until a later one is recorded. The future completes once
        the marker is durable. Queued in order, so it covers exactly the targets queued before it."""
        row = (f"{time.time()!r}",)
        return self._submit(
            "INSERT OR REPLACE INTO meta (key, value) "
            "SELECT 'zeroed_through', COALESCE(MAX(id), 0) || ' ' || ? FROM targets",
            [row],
            wait=True,
        )

    def record_targets(
        self, rows: Iterable[TargetRecord], request: str | None = None, client: str | None = None
    ) -> None:
        """Record targets in one transaction (committed and synced when this returns)."""
        self.record_targets_async(rows, request, client).result()

    def event(
        self,
        kind: str,
        *,
        board: str | None = None,
        actuator: str | None = None,
        client: str | None = None,
        **detail: Any,
    ) -> None:
        """Queue an event (committed by the writer thread with the next group)."""
        row = (time.time(), kind, board, actuator, json.dumps(detail, default=str, sort_keys=True), client)
        self._submit(
            "INSERT INTO events (ts, kind, board, actuator, detail, client) VALUES (?,?,?,?,?,?)", [row], wait=False
        )

    def record_board(self, board: str, boot_count: int, serial: int | None) -> None:
        row = (board, boot_count, serial, time.time())
        self._submit("INSERT OR REPLACE INTO boards VALUES (?,?,?,?)", [row], wait=False)

    # ------------------------------------------------------------------ reading

    def latest_targets(self) -> dict[str, TargetRecord]:
        """The last recorded target of every actuator."""
        self.flush()
        with self._lock:
            rows = self._db.execute(
                "SELECT id, actuator, board, channel, volts, code, value, calibration_version, ts FROM targets "
                "WHERE id IN (SELECT MAX(id) FROM targets GROUP BY actuator)"
            ).fetchall()
            marker = self._db.execute("SELECT value FROM meta WHERE key = 'zeroed_through'").fetchone()
        through, marked_ts = (int(marker[0].split()[0]), float(marker[0].split()[1])) if marker else (0, 0.0)
        out = {}
        for row_id, *fields in rows:
            record = TargetRecord(*fields)
            if row_id <= through:  # an emergency stop came after it
                record = replace(record, volts=0.0, code=0, value=None, ts=marked_ts, stopped_code=record.code)
            out[record.actuator] = record
        return out

    def board_boot_counts(self) -> dict[str, int]:
        self.flush()
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
        self.flush()
        with self._lock:
            rows = self._db.execute(query, args).fetchall()
        return [EventRecord(r[0], r[1], r[2], r[3], r[4], json.loads(r[5] or "{}"), r[6]) for r in rows]

    def target_count(self) -> int:
        self.flush()
        with self._lock:
            return int(self._db.execute("SELECT COUNT(*) FROM targets").fetchone()[0])
