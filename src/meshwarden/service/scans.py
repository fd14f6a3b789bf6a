"""Fault scans in the daemon: run as jobs on request or on the configured schedule, kept as reports.

A scan (:func:`meshwarden.procedures.scan_run.run_scan`) runs as a job under a held claim; its
report is written to ``scans.directory`` (default: a ``scans`` folder beside the journal) as
``<scan id>.json``, its findings are journaled (event ``scan``), and a summary is published on
the ``scan`` telemetry topic. The report lists what changed since the previous report (a part
whose verdict differs, or that is new).

Schedule: ``scans.every_s`` (a period from the daemon's start) or ``scans.at`` (a local time of
day). A due scan is skipped - journaled ``scan_skipped`` with the reason - while the daemon is
not armed, while any target actuator is held by a motion claim (a lock, a calibration, a
client's lease), or while another scan runs; the next one is due a period later.
"""

from __future__ import annotations

import asyncio
import dataclasses
import datetime
import json
import os
import re
import time
from collections import Counter
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

from meshwarden.controller import Controller
from meshwarden.errors import MeshwardenError, RefusedError, UnknownTargetRefused
from meshwarden.logsetup import get_logger
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_run import ScanControl, ScanSettings, run_scan
from meshwarden.service.jobs import Job, Jobs

Publish = Callable[[str, dict[str, Any]], Awaitable[int]]
SCAN_ID = re.compile(r"^scan-\d{8}T\d{6}Z-[A-Za-z0-9-]+$")
OK = "ok"


def settings_from_config(controller: Controller) -> ScanSettings:
    """The scan settings of the ``scans:`` section (every setting of a scan is configurable there)."""
    c = controller.config.scans
    return ScanSettings(**{f.name: getattr(c, f.name) for f in dataclasses.fields(ScanSettings)})


def topology_from_config(controller: Controller) -> LatticeTopology | None:
    """The chip's lattice topology if the configuration has one (``chip.lattice``), else None."""
    lattice = getattr(controller.config.chip, "lattice", None)
    if lattice is None or isinstance(lattice, LatticeTopology):
        return lattice
    try:
        return LatticeTopology.from_lattice(lattice.modes, lattice.columns, lattice.taps, lattice.input_modes)
    except (AttributeError, TypeError, ValueError, MeshwardenError):
        return None


def changes(previous: dict[str, Any] | None, current: dict[str, Any]) -> list[dict[str, Any]]:
    """Parts whose verdict differs from the previous report's (or that it did not have)."""
    out = []
    for kind in ("actuators", "monitors"):
        before = (previous or {}).get(kind, {})
        for part, verdict in current[kind].items():
            was = before.get(part, {}).get("verdict") if previous is not None else None
            if previous is not None and was != verdict["verdict"]:
                out.append({"part": part, "kind": kind[:-1], "was": was, "now": verdict["verdict"]})
    return out


def summary(report: dict[str, Any]) -> dict[str, Any]:
    """One past scan with its counts of findings (what ``scans`` lists)."""
    counts = {kind: dict(Counter(v["verdict"] for v in report[kind].values())) for kind in ("actuators", "monitors")}
    findings = sum(n for kind in counts.values() for verdict, n in kind.items() if verdict not in (OK, "unobservable"))
    return {
        "id": report["id"],
        "started": report["started"],
        "trigger": report["trigger"],
        "frames": report["frames"],
        "findings": findings,
        "counts": counts,
        "changed": len(report["changed"]),
    }


class ScanStore:
    """Report files, one JSON per scan, named by the scan id (ids sort by start time)."""

    def __init__(self, directory: Path) -> None:
        self.directory = directory

    def save(self, report: dict[str, Any]) -> Path:
        self.directory.mkdir(parents=True, exist_ok=True)
        path = self.directory / f"{report['id']}.json"
        partial = path.with_suffix(".part")
        partial.write_text(json.dumps(report, indent=1, sort_keys=True, allow_nan=False), encoding="utf-8")
        os.replace(partial, path)  # a reader never sees half a report
        return path

    def ids(self) -> list[str]:
        if not self.directory.is_dir():
            return []
        return sorted(p.stem for p in self.directory.glob("scan-*.json") if SCAN_ID.match(p.stem))

    def load(self, scan_id: str) -> dict[str, Any] | None:
        try:
            report: dict[str, Any] = json.loads((self.directory / f"{scan_id}.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        return report

    def latest(self) -> dict[str, Any] | None:
        for scan_id in reversed(self.ids()):
            report = self.load(scan_id)
            if report is not None:
                return report
        return None

    def history(self, limit: int = 100) -> list[dict[str, Any]]:
        out = []
        for scan_id in reversed(self.ids()):
            report = self.load(scan_id)
            if report is not None:
                out.append(summary(report))
            if len(out) >= limit:
                break
        return out


class ScanService:
    """Starts scans as jobs, keeps their reports, and runs the schedule."""

    def __init__(
        self,
        controller: Controller,
        jobs: Jobs,
        publish: Publish,
        *,
        clock: Callable[[], float] = time.time,
        sleep: Callable[[float], Awaitable[Any]] = asyncio.sleep,
    ) -> None:
        self.controller = controller
        self.jobs = jobs
        self.publish = publish
        self.clock = clock
        self.sleep = sleep
        config = controller.config
        self.store = ScanStore(config.scans.directory or config.journal.path.parent / "scans")
        self.running: Job | None = None
        self.log = get_logger(component="scans")
        self._background: set[asyncio.Future[Any]] = set()

    # ---------------------------------------------------------------- on request

    def start(self, targets: list[str] | None, client: str, trigger: str = "request") -> Job:
        """Start a scan job; refused before it starts if a target is unknown or a scan runs."""
        for target in targets or []:
            if target not in self.controller.actuators and target not in self.controller.gates:
                raise UnknownTargetRefused(f"unknown target '{target}' (an actuator or gate id)", target=target)
        if self.running is not None and not self.running.task.done():
            raise RefusedError(f"a scan is already running ({self.running.id})", job=self.running.id)
        job_id = self.jobs.next_id()
        control = ScanControl()
        job = self.jobs.start("scan", client, self._run(job_id, targets, client, trigger, control), job_id=job_id)
        job.stopper = control.stop
        self.running = job
        return job

    async def _run(
        self, job_id: str, targets: list[str] | None, client: str, trigger: str, control: ScanControl
    ) -> dict[str, Any]:
        started = self.clock()
        stamp = datetime.datetime.fromtimestamp(started, datetime.UTC).strftime("%Y%m%dT%H%M%SZ")
        scan_id = f"scan-{stamp}-{job_id}"
        previous = await asyncio.to_thread(self.store.latest)
        result = await run_scan(
            self.controller,
            targets,
            owner=f"scan:{job_id}",
            settings=settings_from_config(self.controller),
            topology=topology_from_config(self.controller),
            control=control,
            progress=self._progress(job_id),
            reference=previous,
        )
        changed = changes(previous, result)
        report = {
            "id": scan_id,
            "job": job_id,
            "trigger": trigger,
            "client": client,
            "started": started,
            "finished": self.clock(),
            "targets": targets or [],
            "changed": changed,
            "previous": previous["id"] if previous else None,
            **result,
        }
        path = await asyncio.to_thread(self.store.save, report)
        brief = summary(report)
        findings = {
            part: verdict["verdict"]
            for kind in ("actuators", "monitors")
            for part, verdict in report[kind].items()
            if verdict["verdict"] not in (OK, "unobservable")
        }
        self.controller.journal.event(
            "scan",
            client=client,
            scan=scan_id,
            job=job_id,
            trigger=trigger,
            frames=report["frames"],
            counts=brief["counts"],
            findings=findings,
            changed=changed,
            outputs_restored=report["outputs_restored"],
            report=str(path),
        )
        await self.publish("scan", {**brief, "job": job_id, "findings_by_part": findings, "report": str(path)})
        return report

    def _progress(self, job_id: str) -> Callable[[int, int], None]:
        def report(done: int, total: int) -> None:
            future = asyncio.ensure_future(
                self.publish(
                    "job",
                    {
                        "job": job_id,
                        "kind": "scan",
                        "state": "running",
                        "progress": done / total,
                        "step": done,
                        "steps": total,
                    },
                )
            )
            self._background.add(future)
            future.add_done_callback(self._background.discard)

        return report

    # ---------------------------------------------------------------- schedule

    def next_due(self, after: float) -> float | None:
        """When the next automatic scan is due after ``after`` (epoch seconds), or None if none is configured."""
        c = self.controller.config.scans
        if c.every_s is not None:
            return after + c.every_s
        if c.at is not None:
            hour, minute = (int(x) for x in c.at.split(":"))
            local = datetime.datetime.fromtimestamp(after).astimezone()
            due = local.replace(hour=hour, minute=minute, second=0, microsecond=0)
            if due.timestamp() <= after:
                due += datetime.timedelta(days=1)
            return due.timestamp()
        return None

    def blocked(self) -> str | None:
        """Why an automatic scan may not start now, or None."""
        if self.controller.estopped:
            return "the emergency stop is latched"
        if not self.controller.armed:
            return "the daemon is not armed"
        if self.running is not None and not self.running.task.done():
            return f"a scan is already running ({self.running.id})"
        targets = self.controller.config.scans.targets
        wanted = set(self.controller.actuators) if not targets else set()
        for target in targets:
            gate = self.controller.gates.get(target)
            wanted |= {gate.coupler, gate.phase} if gate is not None else {target}
        held = self.controller.claims.owners()
        busy = sorted(a for a in wanted if a in held)
        if busy:
            return f"{busy[0]} is held by '{held[busy[0]]}'" + (f" (and {len(busy) - 1} more)" if len(busy) > 1 else "")
        return None

    async def run_schedule(self) -> None:
        """Start scans when they are due, for as long as the daemon runs (cancel to stop)."""
        due = self.next_due(self.clock())
        while due is not None:
            await self.sleep(max(0.0, due - self.clock()))
            why = self.blocked()
            if why is not None:
                self.log.info("scheduled scan skipped", reason=why)
                self.controller.journal.event("scan_skipped", client="schedule", reason=why)
                await self.publish("scan", {"state": "skipped", "reason": why})
            else:
                targets = list(self.controller.config.scans.targets) or None
                job = self.start(targets, "schedule", trigger="schedule")
                await asyncio.wait({job.task})
            due = self.next_due(max(due, self.clock()))
