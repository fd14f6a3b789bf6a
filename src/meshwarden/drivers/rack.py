"""The rack: every board behind its own worker thread, awaited from the asyncio loop.

Serial I/O blocks, so each board gets one thread and a priority queue of jobs; the controller
awaits futures and so drives all boards of one operation concurrently. An emergency job jumps
the queue, cancels every ordinary job still waiting, and tells the board's driver to give up
the retries of the transaction in flight - so "zero all" runs before any queued work.
"""

from __future__ import annotations

import asyncio
import itertools
import queue
import threading
from collections.abc import Callable, Iterable
from concurrent.futures import Future
from typing import Any, TypeVar

from meshwarden.config.model import RackConfig
from meshwarden.drivers.base import BoardDriver
from meshwarden.drivers.registry import create_driver
from meshwarden.errors import AbortedError

T = TypeVar("T")
EMERGENCY, NORMAL = 0, 1
_STOP = object()


class BoardWorker:
    """One thread that runs one board's jobs, emergencies first."""

    def __init__(self, driver: BoardDriver) -> None:
        self.driver = driver
        self._queue: queue.PriorityQueue[tuple[int, int, Any, Future[Any] | None]] = queue.PriorityQueue()
        self._counter = itertools.count()
        self._thread = threading.Thread(target=self._run, name=f"board-{driver.config.id}", daemon=True)
        self._thread.start()

    def submit(self, fn: Callable[[BoardDriver], T], priority: int = NORMAL) -> Future[T]:
        future: Future[T] = Future()
        if priority == EMERGENCY:
            self.driver.abort.set()
            self._cancel_waiting()
        self._queue.put((priority, next(self._counter), fn, future))
        return future

    def _cancel_waiting(self) -> None:
        kept = []
        while True:
            try:
                item = self._queue.get_nowait()
            except queue.Empty:
                break
            if item[0] == NORMAL and item[3] is not None:
                item[3].cancel()
            else:
                kept.append(item)
        for item in kept:
            self._queue.put(item)

    def _run(self) -> None:
        while True:
            priority, _, fn, future = self._queue.get()
            if fn is _STOP:
                return
            assert future is not None
            if not future.set_running_or_notify_cancel():
                continue
            if priority == EMERGENCY:
                self.driver.abort.clear()
            try:
                future.set_result(fn(self.driver))
            except BaseException as exc:  # the awaiting side decides what an error means
                future.set_exception(exc)

    def stop(self) -> None:
        self._cancel_waiting()
        self._queue.put((2, next(self._counter), _STOP, None))
        self._thread.join(timeout=10)


class Rack:
    """Drivers for every board of the configuration, each with its worker."""

    def __init__(
        self,
        config: RackConfig,
        drivers: dict[str, BoardDriver] | None = None,
        ceilings: dict[str, tuple[int, ...]] | None = None,
    ) -> None:
        """``ceilings``: each board's per-output hard-limit codes, handed to its driver (which
        then refuses any code above them); boards without one accept no code above zero."""
        self.config = config
        self.drivers = drivers or {b.id: create_driver(b) for b in config.boards}
        for board_id, codes in (ceilings or {}).items():
            self.drivers[board_id].set_ceiling(codes)
        self.workers: dict[str, BoardWorker] = {}

    def start(self) -> None:
        for board_id, driver in self.drivers.items():
            self.workers[board_id] = BoardWorker(driver)

    def submit(self, board_id: str, fn: Callable[[BoardDriver], T], priority: int = NORMAL) -> Future[T]:
        """Queue ``fn(driver)`` on the board's thread; the future of its result."""
        return self.workers[board_id].submit(fn, priority)

    async def call(self, board_id: str, fn: Callable[[BoardDriver], T], priority: int = NORMAL) -> T:
        """Run ``fn(driver)`` on the board's thread and await its result. Work dropped from the
        queue by an emergency stop raises :class:`AbortedError` (not a task cancellation)."""
        future = self.workers[board_id].submit(fn, priority)
        try:
            return await asyncio.wrap_future(future)
        except asyncio.CancelledError:
            task = asyncio.current_task()
            if future.cancelled() and (task is None or not task.cancelling()):
                raise AbortedError(f"board {board_id}: work dropped by an emergency stop", board=board_id) from None
            raise

    async def each(
        self, fn: Callable[[BoardDriver], T], boards: Iterable[str] | None = None, priority: int = NORMAL
    ) -> dict[str, T | BaseException]:
        """Run ``fn`` on several boards at once; per board, its result or its exception."""
        ids = list(boards if boards is not None else self.drivers)
        results = await asyncio.gather(*(self.call(b, fn, priority) for b in ids), return_exceptions=True)
        return dict(zip(ids, results, strict=True))

    def stop(self) -> None:
        """Stop the workers and close the links (idempotent)."""
        for worker in self.workers.values():
            worker.stop()
        self.workers.clear()
        for driver in self.drivers.values():
            driver.close()
