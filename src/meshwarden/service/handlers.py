"""Dispatch of validated requests to the controller, with roles, leases and jobs.

Roles are ordered observer < operator < admin; ``estop`` is allowed to everyone, always. Every
request that changes state, and every refusal, is journaled with the sender's holder name
(:meth:`~meshwarden.service.identity.Sender.holder`: the key's name under CURVE) and the client
string as a label (read-only requests that succeed are not journaled, so that polling does not
fill the journal). Leases are held by the same holder name.

Numbers arrive here already checked for type, finiteness and range (:mod:`.schema`), so the
handlers convert and compute without guarding against overflow again.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Callable
from typing import Any

from meshwarden import __version__
from meshwarden.controller import Controller
from meshwarden.errors import BusError, ForbiddenRefused, MeshwardenError, RefusedError, UnknownTargetRefused
from meshwarden.procedures.lock_law import parse_hold
from meshwarden.procedures.locks import LockEngine, LockSpec
from meshwarden.service.identity import Sender
from meshwarden.service.jobs import Jobs
from meshwarden.service.leases import DEFAULT_TTL_S, Leases
from meshwarden.service.scans import ScanService
from meshwarden.service.schema import MAX_REASON_CHARS, OPS, READ_ONLY, ROLES, Request
from meshwarden.service.telemetry import Telemetry
from meshwarden.service.views import get_view


class Dispatcher:
    def __init__(self, controller: Controller, telemetry: Telemetry) -> None:
        self.controller = controller
        self.telemetry = telemetry
        self.leases = Leases(controller.claims)
        self.jobs = Jobs(telemetry.publish)
        self.scans = ScanService(controller, self.jobs, telemetry.publish)
        self.locks = LockEngine(controller, telemetry.publish)
        self._background: set[asyncio.Task[Any]] = set()
        self.run_token: str | None = None  # set by `serve --run-token`: lets a launcher know its own daemon
        controller.listeners.append(self._on_event)

    def _on_event(self, kind: str, detail: dict[str, Any]) -> None:
        self._spawn(self.telemetry.publish("event", {"kind": kind, **detail}))
        if kind in (
            "arm",
            "disarm",
            "estop",
            "board_reset_detected",
            "board_faulted",
            "restore",
            "interlock_open",
            "interlock_closed",
        ):
            self._spawn(self.telemetry.publish("state", self.state()))

    def _spawn(self, work: Any) -> None:
        task = asyncio.get_running_loop().create_task(work)
        self._background.add(task)
        task.add_done_callback(self._background.discard)

    def state(self) -> dict[str, Any]:
        """Armed, estopped and the boards (not every actuator: status is polled often)."""
        ctl = self.controller
        return {"armed": ctl.armed, "estopped": ctl.estopped, "boards": ctl.board_states()}

    async def handle(self, request: Request, sender: Sender) -> Any:
        """The result of ``request``, or a MeshwardenError."""
        needed = OPS[request.op][0]
        who = sender.holder(request.client)
        role = sender.role
        if request.op != "estop" and (role not in ROLES or ROLES.index(role) < ROLES.index(needed)):
            error = ForbiddenRefused(
                f"'{request.op}' needs the {needed} role; this key is {role}", role=role, needed=needed
            )
            self.controller.journal.event(
                "command",
                client=who,
                op=request.op,
                ok=False,
                code=error.code,
                label=request.client,
                request=request.id,
            )
            raise error
        try:
            result = await getattr(self, f"_op_{request.op}")(request, who)
        except MeshwardenError as exc:
            self.controller.journal.event(
                "command",
                client=who,
                op=request.op,
                ok=False,
                code=exc.code,
                reason=exc.message[:MAX_REASON_CHARS],
                label=request.client,
                request=request.id,
            )
            self._on_event("command", {"client": who, "op": request.op, "ok": False, "code": exc.code})  # refusals too
            raise
        if request.op not in READ_ONLY:
            self.controller.journal.event(
                "command", client=who, op=request.op, ok=True, request=request.id, label=request.client
            )
        return result

    # ------------------------------------------------------------------ read-only

    async def _op_status(self, request: Request, who: str) -> Any:
        return {
            **self.state(),
            "version": __version__,
            "jobs": [j.describe() for j in self.jobs.running()],
            "leases": self.leases.table(),
            "telemetry_seq": self.telemetry.seq,
            "outputs_live": dict(zip(("count", "highest_volts"), self.controller._state.live_outputs(), strict=True)),
            "run_token": self.run_token,
        }

    async def _op_get(self, request: Request, who: str) -> Any:
        return get_view(self.controller)  # snapshot + gates + journaled targets

    async def _op_snapshot(self, request: Request, who: str) -> Any:
        return {"seq": self.telemetry.seq, "state": self.controller.snapshot()}

    async def _op_monitors(self, request: Request, who: str) -> Any:
        # ranges (and their product) were checked by the schema: see ARG_RANGES
        average = int(request.args.get("average", 1))
        integration = float(request.args.get("integration_s", 1e-3))
        return await self.controller.read_monitors(average, integration)

    async def _op_events(self, request: Request, who: str) -> Any:
        limit = int(request.args.get("limit", 100))  # 1..1000, checked by the schema: never clamped
        events = self.controller.journal.events(int(request.args.get("since", 0)), limit=limit)
        return [
            {
                "id": e.id,
                "ts": e.ts,
                "kind": e.kind,
                "board": e.board,
                "actuator": e.actuator,
                "detail": e.detail,
                "client": e.client,
            }
            for e in events
        ]

    async def _op_jobs(self, request: Request, who: str) -> Any:
        return self.jobs.list()

    async def _op_job(self, request: Request, who: str) -> Any:
        job = self.jobs.get(request.args["job"])
        if job is None:
            raise UnknownTargetRefused(f"no job '{request.args['job']}' (finished jobs are kept a while)")
        return job.full()

    # ------------------------------------------------------------------ calibration

    async def _op_calibrate(self, request: Request, who: str) -> Any:
        from meshwarden.procedures.calibrate_run import calibration_job

        job_id = self.jobs.next_id()
        targets = request.args.get("targets")
        if targets is not None and not all(isinstance(t, str) for t in targets):
            raise BusError("bad_request", "calibrate: 'targets' must be a list of actuator or gate ids")

        def on_claim(claim: Any) -> None:
            job.stopper = claim.request_stop

        def progress(done: int, total: int, what: str) -> None:
            job.progress = {"step": done, "steps": total, "what": what}
            if total:
                message = {"job": job_id, "kind": "calibrate", "state": "running", "progress": done / total}
                self._spawn(self.telemetry.publish("job", {**message, **job.progress}))

        job = self.jobs.start(
            "calibrate",
            who,
            calibration_job(
                self.controller,
                targets=targets,
                points=request.args.get("points"),
                activate=bool(request.args.get("activate", True)),
                client=who,
                name=job_id,
                progress=progress,
                on_claim=on_claim,
            ),
            job_id=job_id,
        )
        if not request.args.get("wait", True):
            return {"job": job.id, "state": "running"}
        return await asyncio.shield(job.task)

    async def _op_calibrations(self, request: Request, who: str) -> Any:
        return self.controller.calibrations.summary()

    async def _op_calibration_show(self, request: Request, who: str) -> Any:
        version = request.args["version"]
        store = self.controller.calibrations
        if version == "config":
            shown: dict[str, Any] = {"version": "config", "active": store.active() == "config", "manifest": None}
        else:
            shown = {"version": version, "active": store.active() == version, "manifest": store.manifest(version)}
        if request.args.get("sweeps", False):
            shown.update(self._calibration_sweeps(version))
        return shown

    def _calibration_sweeps(self, version: str) -> dict[str, Any]:
        """A version's measured points, and the chip's layout to draw them on (plots)."""
        from meshwarden.procedures.calibrate_run import topology_of

        try:
            layout: dict[str, Any] | None = topology_of(self.controller).as_dict()
        except RefusedError:
            layout = None  # no chip.lattice: a plot falls back to a grid
        gates = {g: {"coupler": gate.coupler, "phase": gate.phase} for g, gate in self.controller.gates.items()}
        return {"sweeps": self.controller.calibrations.sweeps(version), "layout": layout, "gates": gates}

    async def _op_calibration_activate(self, request: Request, who: str) -> Any:
        return await self.controller.activate_calibration(request.args["version"], client=who)

    # ------------------------------------------------------------------ changes

    async def _op_estop(self, request: Request, who: str) -> Any:
        self.jobs.cancel_all("emergency stop")
        reason = str(request.args.get("reason", ""))[:MAX_REASON_CHARS]  # a label: never a cause to refuse
        return await self.controller.estop(client=who, reason=reason)

    def _actuators_of(self, targets: list[str]) -> list[str]:
        out = []
        for target in targets:
            if target in self.controller.actuators:
                out.append(target)
            elif target in self.controller.gates:
                gate = self.controller.gates[target]
                out += [gate.coupler, gate.phase]
            else:
                raise UnknownTargetRefused(f"unknown target '{target}' (an actuator or gate id)", target=target)
        return out

    async def _op_set(self, request: Request, who: str) -> Any:
        values = request.args["values"]
        volts = bool(request.args.get("volts", False))
        prepared = self.controller.check(values, volts=volts, owner=who)  # refuse before a job exists
        self.leases.check(who, list(prepared))
        job_id = self.jobs.next_id()

        def attach(claim: Any) -> None:  # the motion runs: a cancel now stops it between steps
            job.stopper = claim.request_stop

        job = self.jobs.start(
            "set",
            who,
            self.controller.set(
                values,
                volts=volts,
                client=who,
                request=request.id,
                progress=self._progress(job_id),
                prepared=prepared,
                stop=attach,
            ),
            job_id=job_id,
        )
        return await self._reply_for(job, request, "applied")

    async def _reply_for(self, job: Any, request: Request, key: str) -> dict[str, Any]:
        """The reply to a request that started a job: at once with ``wait: false``, else when the
        job ends (``{"job", "state": "done", key: result}``); a cancelled job is a refusal."""
        if not request.args.get("wait", True):
            return {"job": job.id, "state": "running"}
        try:
            result = await asyncio.shield(job.task)
        except asyncio.CancelledError:
            if job.task.cancelled():
                raise RefusedError(f"{job.id} was cancelled", job=job.id) from None
            raise
        return {"job": job.id, "state": "done", key: result}

    def _progress(self, job_id: str) -> Callable[[int, int], None]:
        """Publish a job's progress on telemetry, at most ten times a second (and at its end)."""
        last = [0.0]

        def report(done: int, total: int) -> None:
            now = time.monotonic()
            if done == total or now - last[0] >= 0.1:
                last[0] = now
                self._spawn(
                    self.telemetry.publish(
                        "job",
                        {
                            "job": job_id,
                            "kind": "set",
                            "state": "running",
                            "progress": done / total,
                            "step": done,
                            "steps": total,
                        },
                    )
                )

        return report

    async def _op_lease(self, request: Request, who: str) -> Any:
        actuators = self._actuators_of(request.args["targets"])
        ttl = float(request.args.get("ttl_s", DEFAULT_TTL_S))
        self.leases.acquire(who, actuators, ttl)
        return {"leased": actuators, "ttl_s": ttl, "holder": who}

    async def _op_release(self, request: Request, who: str) -> Any:
        actuators = self._actuators_of(request.args["targets"])
        self.leases.release(who, actuators)
        return {"released": actuators}

    async def _op_cancel(self, request: Request, who: str) -> Any:
        return {"job": request.args["job"], "cancelled": self.jobs.cancel(request.args["job"])}

    async def _op_disarm(self, request: Request, who: str) -> Any:
        self.jobs.cancel_all("disarm")
        await self.controller.disarm(client=who)
        return self.state()

    async def _op_arm(self, request: Request, who: str) -> Any:
        await self.controller.arm(client=who)
        return self.state()

    async def _op_restore(self, request: Request, who: str) -> Any:
        return await self.controller.restore(client=who)

    async def _op_recover(self, request: Request, who: str) -> Any:
        return await self.controller.recover(request.args["board"], client=who)

    # ------------------------------------------------------------------ fault scans

    async def _op_scan(self, request: Request, who: str) -> Any:
        targets = request.args.get("targets") or None
        if targets:
            self.leases.check(who, self._actuators_of(targets))
        job = self.scans.start(targets, who)
        return await self._reply_for(job, request, "scan")

    async def _op_scans(self, request: Request, who: str) -> Any:
        limit = int(request.args.get("limit", 100))  # 1..1000, checked by the schema
        return await asyncio.to_thread(self.scans.store.history, limit)

    # ------------------------------------------------------------------ locks

    async def _op_lock_start(self, request: Request, who: str) -> Any:
        args = request.args
        spec = LockSpec(
            name=args["name"],
            actuator=args["actuator"],
            monitor=args["monitor"],
            hold=parse_hold(args["hold"]),
            against=args.get("against"),
            dither=float(args["dither"]) if "dither" in args else None,
            bandwidth_hz=float(args["bandwidth_hz"]) if "bandwidth_hz" in args else None,
        )
        return {spec.name: await self.locks.start(spec, client=who)}

    async def _op_locks(self, request: Request, who: str) -> Any:
        return self.locks.table()

    async def _op_lock_stop(self, request: Request, who: str) -> Any:
        return {"stopped": await self.locks.stop(request.args.get("name"))}
