"""The controller: the single owner of the rack. Every output change goes through it.

Flow of a ``set``: resolve names -> map logical values to volts (refusing the unreachable) ->
codes -> guard (hard limits, ramp plan in steps within the step limit and the dynamic check)
-> journal (targets recorded and synced before any write) -> per-board writes, concurrently
across boards, each verified against the codes the board reports latched -> state.

State rules (docs/architecture.md): the controller starts disarmed; outputs change only while
armed, except toward zero; an emergency stop latches, cancels any ramp in progress and queued
work, zeroes every board first, and holds until an explicit re-arm; on start nothing is written:
boards still holding the journaled codes are adopted, a board that was reset stays at zero until
``restore``. Every refusal changes nothing and says why.
"""

from __future__ import annotations

import asyncio
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from meshwarden.calibration import load_calibration
from meshwarden.config.model import ActuatorConfig, BoardConfig, Config
from meshwarden.drivers.base import BoardDriver, BoardIdentity
from meshwarden.drivers.rack import EMERGENCY, Rack
from meshwarden.errors import (
    AbortedError,
    FaultedRefused,
    LimitRefused,
    LinkError,
    MeshwardenError,
    NotArmedRefused,
    UnknownTargetRefused,
    UnreachableRefused,
)
from meshwarden.guard import ChannelLimit, RampPlan, check_targets, plan_ramp
from meshwarden.journal import Journal, TargetRecord
from meshwarden.logsetup import get_logger
from meshwarden.mapping import ActuatorMap, code_to_volts, volts_to_code
from meshwarden.readout import acquire_monitors, read_sense
from meshwarden.startup import BoardFound, adopt, bring_up, journaled_codes

Listener = Callable[[str, dict[str, Any]], None]
Prepared = dict[str, tuple[int, float | None]]  # actuator -> (target code, logical value or None)


@dataclass
class ActuatorState:
    """What the controller knows of one actuator."""

    config: ActuatorConfig
    board: BoardConfig
    map: ActuatorMap
    limit: ChannelLimit
    calibration_version: str
    value: float | None = None  # the logical value last requested (None: set in volts or unknown)
    last_write: float = -math.inf  # monotonic time of the last write to this channel


@dataclass
class BoardState:
    config: BoardConfig
    codes: list[int]  # last codes confirmed latched, every output
    identity: BoardIdentity | None = None
    boot_count: int | None = None
    needs_restore: bool = False
    faulted: bool = False
    notes: list[str] = field(default_factory=list)


class Controller:
    """Owns the rack; use :func:`meshwarden.api.open_controller` to get one started."""

    def __init__(
        self, config: Config, rack: Rack, journal: Journal, monotonic: Callable[[], float] = time.monotonic
    ) -> None:
        self.config = config
        self.rack = rack
        self.journal = journal
        self.monotonic = monotonic
        self.log = get_logger(component="controller")
        self.armed = False
        self.estopped = False
        self._motion = asyncio.Lock()
        self._heartbeat_task: asyncio.Task[None] | None = None
        self._last_step_time = -math.inf
        self.listeners: list[Listener] = []
        self.boards = {b.id: BoardState(b, [0] * b.outputs) for b in config.rack.boards}
        self.actuators: dict[str, ActuatorState] = {}
        for act in config.chip.actuators:
            board = config.rack.board(act.output.board)
            table = load_calibration(act.calibration)
            hard = config.hard_limit_volts(act)
            lsb = board.full_scale_volts / (1 << board.dac_bits)
            self.actuators[act.id] = ActuatorState(
                act,
                board,
                ActuatorMap(act.id, act.kind, table, hard),
                ChannelLimit(
                    act.id,
                    act.kind,
                    lsb,
                    hard,
                    act.step_limit_volts,
                    act.dwell_s,
                    act.pull_in_volts,
                    config.safety.pull_in_margin,
                    (1 << board.dac_bits) - 1,
                ),
                table.version,
            )
        self.gates = {g.id: g for g in config.chip.gates}

    # ------------------------------------------------------------------ events

    def _emit(self, kind: str, client: str | None = None, **detail: Any) -> None:
        self.journal.event(
            kind,
            client=client,
            board=detail.get("board"),
            actuator=detail.get("actuator"),
            **{k: v for k, v in detail.items() if k not in ("board", "actuator")},
        )
        for listener in list(self.listeners):
            listener(kind, detail)

    # ------------------------------------------------------------------ start and stop

    async def start(self) -> None:
        """Open every board, check it is the board the configuration describes, configure its
        watchdog and monitor gains, and adopt its outputs without writing any."""
        self.rack.start()
        journaled = self.journal.latest_targets()
        boots = self.journal.board_boot_counts()
        chip = self.config.chip
        results = await self.rack.each(lambda driver: bring_up(driver, chip))
        for board_id, result in results.items():
            state = self.boards[board_id]
            if isinstance(result, BaseException):
                state.faulted = True
                self._emit("board_unreachable", board=board_id, error=str(result))
                self.log.error("board unreachable at start", board=board_id, error=str(result))
                continue
            state.identity, state.boot_count = result.identity, result.identity.boot_count
            state.codes = list(result.codes)
            self._adopt(state, journaled, boots.get(board_id), result)
            self.journal.record_board(board_id, result.identity.boot_count, result.identity.serial)
        for aid, record in journaled.items():
            if aid in self.actuators:
                act = self.actuators[aid]
                if self.boards[act.board.id].codes[act.config.output.index] == record.code:
                    act.value = record.value
        for aid in self.over_limit():
            self._emit("above_limit", actuator=aid, code=self._current_codes()[aid])
            self.log.error("output found above its hard limit; disarm to ramp it down", actuator=aid)
        self._emit(
            "start", armed=False, calibration_versions=sorted({a.calibration_version for a in self.actuators.values()})
        )
        self._heartbeat_task = asyncio.create_task(self._heartbeat_loop(), name="heartbeat")

    def _adopt(
        self, state: BoardState, journaled: dict[str, TargetRecord], old_boot: int | None, found: BoardFound
    ) -> None:
        board_id = state.config.id
        verdict = adopt(found, journaled_codes(board_id, state.config.outputs, journaled), old_boot)
        state.needs_restore = verdict.needs_restore
        detail: dict[str, Any] = {"board": board_id}
        if verdict.kind == "adopted":
            detail["channels_on"] = sum(1 for c in found.codes if c)
        elif verdict.kind == "board_reset_detected":
            detail.update(old_boot=old_boot, boot=found.identity.boot_count)
        elif verdict.kind == "adoption_mismatch":
            detail["channels"] = list(verdict.channels[:16])
        self._emit(verdict.kind, **detail)
        if verdict.kind != "adopted":
            self.log.warning(
                "board not adopted; outputs left as found",
                board=board_id,
                reason=verdict.kind,
                needs_restore=state.needs_restore,
            )

    async def close(self) -> None:
        """Stop background work and the board threads; outputs stay as they are (the boards'
        watchdogs take over if no daemon comes back; a restarted daemon adopts them)."""
        if self._heartbeat_task is not None:
            self._heartbeat_task.cancel()
            await asyncio.gather(self._heartbeat_task, return_exceptions=True)
            self._heartbeat_task = None
        await asyncio.to_thread(self.rack.stop)
        self._emit("stop")

    # ------------------------------------------------------------------ heartbeat

    def heartbeat_interval_s(self) -> float:
        return max(0.2, min(min(b.watchdog.timeout_s for b in self.config.rack.boards) / 4.0, 5.0))

    async def _heartbeat_loop(self) -> None:
        while True:
            await asyncio.sleep(self.heartbeat_interval_s())
            await self.heartbeat_once()

    async def heartbeat_once(self) -> None:
        """Feed every watchdog; notice resets (boot counter), tripped watchdogs and faulted links;
        bring up boards that were unreachable at start (a rack powered after the daemon)."""
        absent = [b for b, s in self.boards.items() if s.identity is None]
        if absent:
            await self._bring_up_late(absent)
        present = [b for b, s in self.boards.items() if s.identity is not None]
        results = await self.rack.each(lambda d: (d.heartbeat(), d.status()), boards=present)
        for board_id, result in results.items():
            state = self.boards[board_id]
            if isinstance(result, asyncio.CancelledError | AbortedError):
                continue  # an emergency stop took the board meanwhile
            if isinstance(result, BaseException):
                self._emit("link_fault", board=board_id, error=str(result))
                if self.rack.drivers[board_id].faulted and not state.faulted:
                    state.faulted = True
                    self._emit("board_faulted", board=board_id)
                    await self.estop(reason=f"board {board_id} faulted")
                continue
            beat, status = result
            if state.boot_count is not None and beat.boot_count != state.boot_count:
                await self._board_was_reset(state, beat.boot_count)
            elif status.watchdog_tripped and not state.needs_restore:
                # The board acted on its own (we were stalled): its outputs are not what we think.
                self._emit("watchdog_tripped", board=board_id)
                await self._resync(board_id)
                state.needs_restore = True

    async def _bring_up_late(self, boards: list[str]) -> None:
        chip = self.config.chip
        journaled = self.journal.latest_targets()
        boots = self.journal.board_boot_counts()
        results = await self.rack.each(lambda driver: bring_up(driver, chip), boards=boards)
        for board_id, result in results.items():
            if isinstance(result, BaseException):
                continue  # still away; the driver's backoff paces the retries
            state = self.boards[board_id]
            state.identity, state.boot_count = result.identity, result.identity.boot_count
            state.codes = list(result.codes)
            state.faulted = False
            self._adopt(state, journaled, boots.get(board_id), result)
            self.journal.record_board(board_id, result.identity.boot_count, result.identity.serial)
            self._emit("board_up", board=board_id, boot=result.identity.boot_count)

    async def recover(self, board_id: str, client: str | None = None) -> dict[str, Any]:
        """After the operator has fixed a faulted board's link: forget its error history, bring
        it up again (no writes) and adopt it or mark it for restore. Needs the daemon disarmed."""
        if board_id not in self.boards:
            raise UnknownTargetRefused(f"unknown board '{board_id}'", target=board_id)
        if self.armed:
            raise FaultedRefused("disarm before recovering a board")
        state = self.boards[board_id]
        await self.rack.call(board_id, lambda d: d.recover())
        state.identity = None
        await self._bring_up_late([board_id])
        if state.identity is None:
            state.faulted = True
            raise FaultedRefused(
                f"board {board_id} still does not answer; it is tried again at every heartbeat", board=board_id
            )
        self._emit("recover", client=client, board=board_id)
        return {"board": board_id, "boot_count": state.boot_count, "needs_restore": state.needs_restore}

    async def _resync(self, board_id: str) -> None:
        """Believe the board: read back every output code into the controller's state."""
        state = self.boards[board_id]
        try:
            codes = await self.rack.call(board_id, lambda d: d.read_codes(0, d.config.outputs))
        except MeshwardenError as exc:
            self._emit("link_fault", board=board_id, error=str(exc))
            return
        if list(codes) != state.codes:
            changed = [i for i, (a, b) in enumerate(zip(codes, state.codes, strict=True)) if a != b]
            self._emit("resync", board=board_id, channels=changed[:16])
            for act in self.actuators.values():
                if act.board.id == board_id and act.config.output.index in changed:
                    act.value = None
        state.codes = list(codes)

    async def _board_was_reset(self, state: BoardState, boot: int) -> None:
        board_id = state.config.id
        old = state.boot_count
        state.boot_count = boot
        state.codes = [0] * state.config.outputs
        state.needs_restore = True
        for act in self.actuators.values():
            if act.board.id == board_id:
                act.value = None
        self.journal.record_board(board_id, boot, state.identity.serial if state.identity else None)
        self._emit("board_reset_detected", board=board_id, old_boot=old, boot=boot)
        self.log.error("board was reset; its outputs are at zero until restore", board=board_id)
        try:
            await self.rack.call(
                board_id, lambda d: d.configure_watchdog(state.config.watchdog.timeout_s, state.config.watchdog.action)
            )
        except MeshwardenError as exc:
            self._emit("link_fault", board=board_id, error=str(exc))

    # ------------------------------------------------------------------ arm, disarm, stop

    def over_limit(self) -> list[str]:
        """Actuators whose output is above their hard limit: found so at start (the limit was
        lowered while the boards held a higher code). Only moves toward zero are allowed then."""
        current = self._current_codes()
        return [aid for aid, a in self.actuators.items() if current[aid] > a.limit.hard_limit_code]

    async def arm(self, client: str | None = None) -> None:
        """Allow outputs to change; clears a latched emergency stop and the boards' fault flags."""
        # Look first: a reset or a tripped watchdog must be noticed before clearing the flags
        # that show it, even if arming is then refused.
        await self.heartbeat_once()
        above = self.over_limit()
        if above:
            self._emit("refused", client=client, op="arm", reason="outputs above their limit", actuators=above)
            raise LimitRefused(
                f"cannot arm: {', '.join(above)} above the hard limit; disarm first (ramps to zero)", actuators=above
            )
        faulted = [b for b, s in self.boards.items() if s.faulted]
        if faulted:
            self._emit("refused", client=client, op="arm", reason="faulted boards", boards=faulted)
            raise FaultedRefused(f"cannot arm: board(s) {', '.join(faulted)} faulted or unreachable", boards=faulted)
        results = await self.rack.each(lambda d: d.clear_faults())
        failed = {b: str(r) for b, r in results.items() if isinstance(r, BaseException)}
        if failed:
            raise FaultedRefused(f"cannot arm: {failed}", boards=sorted(failed))
        for board_id in self.boards:  # ramps start from what the boards really hold
            await self._resync(board_id)
        self.estopped = False
        self.armed = True
        self._emit("arm", client=client)

    async def disarm(self, client: str | None = None) -> None:
        """Ramp every output to zero within the guard's steps, then stay disarmed."""
        async with self._motion:
            targets = {aid: 0 for aid in self.actuators}
            current = self._current_codes()
            plan = plan_ramp(self._limits(), current, targets)
            now = time.time()
            self.journal.record_targets([self._record(a, 0, None, now) for a, c in current.items() if c], None, client)
            try:
                await self._execute(plan, client, allow_disarmed=True)
            finally:
                self.armed = False
                self._emit("disarm", client=client)

    async def estop(self, client: str | None = None, reason: str = "") -> dict[str, str]:
        """Latch the emergency stop and zero every board now, before any queued work. Never raises."""
        self.estopped = True
        self.armed = False
        results = await self.rack.each(lambda d: d.zero_all(), priority=EMERGENCY)
        outcome = {}
        for board_id, result in results.items():
            if isinstance(result, BaseException):
                outcome[board_id] = f"not confirmed: {result} (its watchdog will act)"
            else:
                self.boards[board_id].codes = [0] * self.boards[board_id].config.outputs
                outcome[board_id] = "zero"
        zeroed = [a for a, act in self.actuators.items() if outcome.get(act.board.id) == "zero"]
        for aid in zeroed:
            self.actuators[aid].value = None
        now = time.time()
        self.journal.record_targets([self._record(a, 0, None, now) for a in zeroed], None, client)
        self._emit("estop", client=client, reason=reason, boards=outcome)
        self.log.warning("emergency stop", reason=reason, boards=outcome)
        return outcome

    # ------------------------------------------------------------------ set and restore

    def resolve(self, name: str) -> tuple[str, str | None]:
        """``c03`` -> (c03, None); ``g05.kappa`` -> (coupler of g05, "kappa"); ``g05.phase`` likewise."""
        if name in self.actuators:
            return name, None
        gate_id, _, attribute = name.partition(".")
        if gate_id in self.gates and attribute in ("kappa", "phase"):
            gate = self.gates[gate_id]
            return (gate.coupler if attribute == "kappa" else gate.phase), attribute
        raise UnknownTargetRefused(f"unknown target '{name}' (an actuator id, or GATE.kappa / GATE.phase)", target=name)

    def prepare(self, values: dict[str, float], *, volts: bool = False) -> Prepared:
        """Validate a whole request without touching anything: actuator -> (code, logical value)."""
        out: Prepared = {}
        for name, raw in values.items():
            actuator_id, _ = self.resolve(name)
            if actuator_id in out:
                raise UnknownTargetRefused(
                    f"'{name}' sets actuator {actuator_id} a second time in one request", target=name
                )
            if isinstance(raw, bool) or not isinstance(raw, int | float) or not math.isfinite(raw):
                raise UnreachableRefused(f"{name}: value must be a finite number, got {raw!r}", target=name)
            act = self.actuators[actuator_id]
            target_volts = float(raw) if volts else act.map.volts_for(float(raw))
            code = volts_to_code(target_volts, act.board.full_scale_volts, act.board.dac_bits)
            if code == act.limit.hard_limit_code + 1 and target_volts <= act.limit.hard_limit_volts:
                code -= 1  # rounding to the nearest code must not step over the limit
            check_targets({actuator_id: act.limit}, {actuator_id: code})
            value = None if volts else float(raw)
            if volts:
                try:
                    value = act.map.value_at(code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits))
                except MeshwardenError:
                    value = None
            out[actuator_id] = (code, value)
        return out

    def check(self, values: dict[str, float], *, volts: bool = False) -> Prepared:
        """Validate a whole request against the calibration, the limits and the current state,
        without touching anything; the result can be handed to :meth:`set`."""
        if self.estopped:
            raise NotArmedRefused("emergency stop is latched: arm again first")
        prepared = self.prepare(values, volts=volts)
        self._check_state(prepared)
        return prepared

    def _check_state(self, prepared: Prepared) -> None:
        if self.estopped:
            raise NotArmedRefused("emergency stop is latched: arm again first")
        current = self._current_codes()
        if not self.armed and any(code > current[a] for a, (code, _) in prepared.items()):
            raise NotArmedRefused("outputs may only move toward zero while disarmed: arm first")
        blocked = sorted({self.actuators[a].board.id for a in prepared} & self._unavailable_boards())
        if blocked:
            raise FaultedRefused(f"board(s) {', '.join(blocked)} faulted or waiting for restore", boards=blocked)

    async def set(
        self,
        values: dict[str, float],
        *,
        volts: bool = False,
        client: str | None = None,
        request: str | None = None,
        progress: Callable[[int, int], None] | None = None,
        prepared: Prepared | None = None,
    ) -> dict[str, dict[str, Any]]:
        """Apply a whole request, or refuse it whole before the first write. ``prepared`` (from
        :meth:`check`) spares mapping the values twice; the state is checked again here anyway.
        ``progress(done, total)`` is called after each step of the ramp."""
        try:
            if prepared is None:
                prepared = self.check(values, volts=volts)
            else:
                self._check_state(prepared)
        except MeshwardenError as exc:
            self._emit("refused", client=client, op="set", code=exc.code, reason=exc.message)
            raise
        async with self._motion:
            plan = plan_ramp(self._limits(), self._current_codes(), {a: c for a, (c, _) in prepared.items()})
            now = time.time()
            self.journal.record_targets(
                [self._record(a, code, value, now) for a, (code, value) in prepared.items()], request, client
            )
            await self._execute(plan, client, allow_disarmed=not self.armed, progress=progress)
            for aid, (_, value) in prepared.items():
                self.actuators[aid].value = value
        return {aid: self.describe(aid) for aid in prepared}

    def _record(self, actuator_id: str, code: int, value: float | None, ts: float) -> TargetRecord:
        act = self.actuators[actuator_id]
        return TargetRecord(
            actuator_id,
            act.board.id,
            act.config.output.index,
            code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits),
            code,
            value,
            act.calibration_version,
            ts,
        )

    async def restore(self, client: str | None = None) -> dict[str, dict[str, Any]]:
        """Ramp boards that were reset (or tripped) back to their journaled targets; needs arming."""
        if not self.armed:
            raise NotArmedRefused("restore needs the daemon armed")
        waiting = [b for b, s in self.boards.items() if s.needs_restore and not s.faulted]
        journaled = self.journal.latest_targets()
        targets = {a: r for a, r in journaled.items() if a in self.actuators and self.actuators[a].board.id in waiting}
        async with self._motion:
            plan = plan_ramp(self._limits(), self._current_codes(), {a: r.code for a, r in targets.items()})
            await self._execute(plan, client, allow_disarmed=False)
            for aid, record in targets.items():
                self.actuators[aid].value = record.value
            for b in waiting:
                self.boards[b].needs_restore = False
        self._emit("restore", client=client, boards=waiting)
        return {aid: self.describe(aid) for aid in targets}

    # ------------------------------------------------------------------ plan execution

    def _limits(self) -> dict[str, ChannelLimit]:
        return {aid: a.limit for aid, a in self.actuators.items()}

    def _current_codes(self) -> dict[str, int]:
        return {aid: self.boards[a.board.id].codes[a.config.output.index] for aid, a in self.actuators.items()}

    def _unavailable_boards(self) -> frozenset[str]:
        return frozenset(b for b, s in self.boards.items() if s.faulted or s.needs_restore)

    async def _execute(
        self,
        plan: RampPlan,
        client: str | None,
        allow_disarmed: bool,
        progress: Callable[[int, int], None] | None = None,
    ) -> None:
        """Write the plan's steps, waiting each step's dwell; stop at an emergency stop."""
        for index, step in enumerate(plan.steps):
            moving = list(step.codes)
            ready_at = max(self.actuators[a].last_write + self.actuators[a].limit.dwell_s for a in moving)
            if index > 0:
                ready_at = max(ready_at, self._last_step_time + step.dwell_before_s)
            delay = ready_at - self.monotonic()
            if delay > 0:
                await asyncio.sleep(delay)
            if self.estopped or (not self.armed and not allow_disarmed):
                raise NotArmedRefused("stopped: emergency stop or disarm during the ramp")
            if not self.armed:  # rule 3, checked on the real state at every step: only toward zero
                current = self._current_codes()
                if any(code > current[a] for a, code in step.codes.items()):
                    raise NotArmedRefused("outputs may only move toward zero while disarmed: arm first")
            await self._write_step(step.codes, client)
            self._last_step_time = self.monotonic()
            if progress is not None:
                progress(index + 1, len(plan.steps))

    async def _write_step(self, codes: dict[str, int], client: str | None) -> None:
        by_board: dict[str, dict[int, int]] = {}
        for aid, code in codes.items():
            act = self.actuators[aid]
            by_board.setdefault(act.board.id, {})[act.config.output.index] = code
        batches: dict[str, tuple[int, tuple[int, ...]]] = {}
        for board_id, channels in by_board.items():
            first, last = min(channels), max(channels)
            block = list(self.boards[board_id].codes[first : last + 1])
            for ch, code in channels.items():
                block[ch - first] = code
            batches[board_id] = (first, tuple(block))
        results = await asyncio.gather(
            *(self.rack.call(b, _writer(*batch)) for b, batch in batches.items()),
            return_exceptions=True,
        )
        now = self.monotonic()
        if self.estopped:
            return  # an emergency stop zeroed the boards after these writes: zero is the truth
        errors = []
        for (board_id, (first, span)), result in zip(batches.items(), results, strict=True):
            if isinstance(result, BaseException):
                errors.append((board_id, result))
                continue
            self.boards[board_id].codes[first : first + len(span)] = list(span)
        for aid in codes:
            if self.actuators[aid].board.id not in {b for b, _ in errors}:
                self.actuators[aid].last_write = now
        if errors:
            for board_id, exc in errors:
                self._emit(
                    "write_failed", client=client, board=board_id, error=str(exc), code=getattr(exc, "code", "error")
                )
            board_id, exc = errors[0]
            if isinstance(exc, MeshwardenError):
                raise exc
            raise LinkError(f"board {board_id}: {exc}") from exc

    # ------------------------------------------------------------------ reading

    def describe(self, actuator_id: str) -> dict[str, Any]:
        act = self.actuators[actuator_id]
        code = self.boards[act.board.id].codes[act.config.output.index]
        return {
            "kind": act.config.kind,
            "board": act.board.id,
            "channel": act.config.output.index,
            "volts": code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits),
            "code": code,
            "limit_v": act.limit.hard_limit_volts,
            "value": act.value,
        }

    def snapshot(self) -> dict[str, Any]:
        """The state as ``get --json`` reports it."""
        return {
            "armed": self.armed,
            "estopped": self.estopped,
            "boards": {
                b: {
                    "boot_count": s.boot_count,
                    "needs_restore": s.needs_restore,
                    "faulted": s.faulted,
                    "error_rate": round(self.rack.drivers[b].error_rate, 4),
                }
                for b, s in self.boards.items()
            },
            "actuators": {aid: self.describe(aid) for aid in self.actuators},
        }

    async def read_monitors(self, average: int = 1, integration_s: float = 1e-3) -> dict[str, dict[str, float]]:
        """Every monitor in amps (photocurrent), watts (optical, by responsivity) and mean ADC counts."""
        full_scale = {b: s.identity.adc_full_scale_volts for b, s in self.boards.items() if s.identity is not None}
        return await acquire_monitors(self.rack, self.config, full_scale, average, integration_s)

    async def read_sense(self) -> dict[str, float]:
        """The boards' own measurement of every wired output, in volts."""
        return await read_sense(self.rack, self.config.chip.actuators)


def _writer(first: int, codes: tuple[int, ...]) -> Callable[[BoardDriver], tuple[int, ...]]:
    return lambda driver: driver.write_codes(first, codes)
