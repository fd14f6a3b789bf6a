"""Jobs: long-running work (ramps now; calibration, locks and scans later) with an id, progress
on the telemetry stream and cancellation. A job runs as its own asyncio task, so status and
estop requests are served while it runs.

Cancelling a job that moves outputs is a cooperative stop: the job's motion claim is asked to
stop before its next step (the write in flight completes and is recorded), and the job ends
``cancelled``. Only a job that has not started moving yet is cancelled as a task."""

from __future__ import annotations

import asyncio
import itertools
import time
from collections import OrderedDict
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from typing import Any

from meshwarden.errors import MeshwardenError, StoppedRefused

KEEP_FINISHED = 200


@dataclass
class Job:
    id: str
    kind: str
    client: str
    task: asyncio.Task[Any]
    started: float = field(default_factory=time.time)
    state: str = "running"  # running | done | failed | cancelled
    result: Any = None
    error: dict[str, Any] | None = None
    stopper: Callable[[str], None] | None = None  # cooperative stop, once the job's motion runs
    progress: dict[str, Any] | None = None  # the last progress report (step, steps, what)
    stop_requested: bool = False

    def stop(self, reason: str) -> None:
        """Stop the job: cooperatively when its motion runs, else by cancelling its task."""
        self.stop_requested = True
        if self.stopper is not None:
            self.stopper(reason)
        else:
            self.task.cancel()

    def describe(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "kind": self.kind,
            "client": self.client,
            "state": self.state,
            "started": self.started,
            "error": self.error,
            "progress": self.progress,
        }

    def full(self) -> dict[str, Any]:
        """The description with the result of a finished job (the `job` op)."""
        return {**self.describe(), "result": self.result}


class Jobs:
    def __init__(self, publish: Callable[[str, dict[str, Any]], Awaitable[int]]) -> None:
        self.publish = publish
        self._jobs: OrderedDict[str, Job] = OrderedDict()
        self._ids = itertools.count(1)
        self._background: set[asyncio.Future[Any]] = set()

    def next_id(self) -> str:
        return f"job-{next(self._ids)}"

    def start(self, kind: str, client: str, work: Awaitable[Any], job_id: str | None = None) -> Job:
        job_id = job_id or self.next_id()
        task = asyncio.ensure_future(work)
        job = Job(job_id, kind, client, task)
        self._jobs[job_id] = job
        task.add_done_callback(self._on_done)
        self._keep(asyncio.ensure_future(self.publish("job", {"job": job_id, "kind": kind, "state": "running"})))
        while len(self._jobs) > KEEP_FINISHED:
            oldest = next(iter(self._jobs.values()))
            if oldest.state == "running":
                break
            self._jobs.popitem(last=False)
        return job

    def _on_done(self, task: asyncio.Task[Any]) -> None:
        job = next(j for j in self._jobs.values() if j.task is task)
        self._keep(asyncio.ensure_future(self._finished(job)))

    def _keep(self, future: asyncio.Future[Any]) -> None:
        """Hold a reference to background work until it ends (asyncio keeps only weak ones), and
        not a moment longer: a finished future leaves nothing behind."""
        self._background.add(future)
        future.add_done_callback(self._background.discard)

    async def _finished(self, job: Job) -> None:
        if job.task.cancelled():
            job.state = "cancelled"
        elif job.stop_requested and isinstance(job.task.exception(), StoppedRefused):
            job.state = "cancelled"
            exc = job.task.exception()
            assert isinstance(exc, StoppedRefused)
            job.error = exc.as_dict()
        elif (exc := job.task.exception()) is not None:
            job.state = "failed"
            job.error = exc.as_dict() if isinstance(exc, MeshwardenError) else {"code": "error", "message": str(exc)}
        else:
            job.state = "done"
            job.result = job.task.result()
        await self.publish("job", {"job": job.id, "kind": job.kind, "state": job.state, "error": job.error})

    def get(self, job_id: str) -> Job | None:
        return self._jobs.get(job_id)

    def cancel(self, job_id: str) -> bool:
        job = self._jobs.get(job_id)
        if job is None or job.task.done():
            return False
        job.stop("cancelled by a client")
        return True

    def cancel_all(self, reason: str = "cancelled") -> None:
        for job in self._jobs.values():
            if not job.task.done():
                job.stop(reason)

    def running(self) -> list[Job]:
        return [j for j in self._jobs.values() if j.state == "running"]

    def list(self) -> list[dict[str, Any]]:
        return [j.describe() for j in self._jobs.values()]
