"""The controller: the single owner of the rack, its state machine and its front door.

Flow of a ``set``: resolve names -> map logical values to volts (refusing the unreachable) ->
codes -> guard check -> a motion claim on the actuators (refused ``busy`` if another owner
holds one) -> motion: plan from the codes the boards were seen to hold -> journal (targets
recorded and synced before any write) -> steps, each re-checked and verified -> state.

The rooms (docs/architecture.md): :mod:`meshwarden.rackstate` (the shared facts),
:mod:`meshwarden.motion` (plans and writes, re-read on doubt, cooperative stop),
:mod:`meshwarden.supervision` (bring-up, heartbeat, recover, resync), :mod:`meshwarden.claims`
(who may move what). This module: arm, disarm, estop, set, restore, claims for procedures,
reads.

State rules: the controller starts disarmed; outputs change only while armed, except toward
zero; an emergency stop latches, ends every claim, zeroes every board first (faulted ones too)
and holds until an explicit re-arm; on start nothing is written. Every refusal changes nothing
and says why.
"""

from __future__ import annotations

import asyncio
import functools
import math
import time
from collections.abc import AsyncIterator, Callable, Iterator
from contextlib import asynccontextmanager, contextmanager
from typing import Any

from meshwarden.calibration import CalibrationTable, load_calibration
from meshwarden.calibration_store import BASE_VERSION, CalibrationStore
from meshwarden.claims import Claim, ClaimRegistry
from meshwarden.config.model import Config
from meshwarden.crosstalk import CrosstalkShares
from meshwarden.drivers.rack import EMERGENCY, Rack
from meshwarden.errors import (
    CalibrationError,
    FaultedRefused,
    LimitRefused,
    MeshwardenError,
    NotArmedRefused,
    UnknownTargetRefused,
    UnreachableRefused,
)
from meshwarden.guard import RampPlan, check_targets
from meshwarden.interlocks import InterlockWatch
from meshwarden.journal import Journal
from meshwarden.mapping import ActuatorMap, code_to_volts, volts_to_code
from meshwarden.motion import Motion, Progress
from meshwarden.rackstate import ActuatorState, BoardState, Listener, RackState
from meshwarden.readout import acquire_monitors, read_sense
from meshwarden.supervision import Supervisor

REACH_TOLERANCE = 1e-3  # a request within this of its value (kappa, or rad) under crosstalk is met
# An emergency stop's reply waits at most this long, after the boards are zero, for its journal
# marker (one fsync, normally done while the boards were being zeroed): a stalled disk may delay
# the answer by this much, never the zeroing itself. 25 ms doubled the median reply on the
# 768-output bench under load (the marker queued behind the writer's work); 3 ms does not.
ESTOP_MARK_WAIT_S = 0.003
Prepared = dict[str, tuple[int, float | None]]  # actuator -> (target code, logical value or None)

__all__ = ["ActuatorState", "BoardState", "Controller", "Prepared"]


class Controller:
    """Owns the rack; use :func:`meshwarden.api.open_controller` to get one started."""

    def __init__(self, config: Config, rack: Rack, journal: Journal) -> None:
        self.config = config
        self._state = RackState(config, rack, journal)
        self.journal = journal
        self.log = self._state.log
        self.claims = ClaimRegistry()
        self._stops = 0  # counts estops and disarms: an arm that saw one begin meanwhile must not finish
        self._motion = Motion(self._state)
        self._supervisor = Supervisor(self._state, self._motion, self.estop)
        self._interlocks = InterlockWatch(self._state, self.estop)
        self.calibrations = CalibrationStore(config.journal.path.parent / "calibration")
        self._crosstalk = CrosstalkShares()
        self._ramps: list[dict[str, int]] = []  # the codes each move in progress ends at
        active = self.calibrations.chosen()
        if active != BASE_VERSION:  # the version last activated, before any output is adopted
            try:
                tables, crosstalk = self._tables_of(active), self._crosstalk_of(active)
            except MeshwardenError as exc:  # e.g. the configuration changed since it was made
                stored = ", ".join(self.calibrations.names())
                raise CalibrationError(
                    f"the active calibration version '{active}' cannot be used with this configuration: "
                    f"{exc.message}. Start on another with `meshwarden serve --calibration VERSION` "
                    f"('{BASE_VERSION}': the configuration's own tables; stored versions: {stored})"
                ) from exc
            self._swap_tables(tables, crosstalk)

    # ------------------------------------------------------------------ state, read-only views

    @property
    def armed(self) -> bool:
        return self._state.armed

    @property
    def estopped(self) -> bool:
        return self._state.estopped

    @property
    def boards(self) -> dict[str, BoardState]:
        return self._state.boards

    @property
    def actuators(self) -> dict[str, ActuatorState]:
        return self._state.actuators

    @property
    def gates(self) -> dict[str, Any]:
        return self._state.gates

    @property
    def listeners(self) -> list[Listener]:
        return self._state.listeners

    @property
    def _heartbeat_task(self) -> Any:
        return self._supervisor.task

    def _emit(self, kind: str, client: str | None = None, **detail: Any) -> None:
        self._state.emit(kind, client, **detail)

    # ------------------------------------------------------------------ start and stop

    async def start(self) -> None:
        """Bring every board up and adopt its outputs without writing any."""
        await self._supervisor.start()
        await self._interlocks.start()
        for aid in self.over_limit():
            self._emit("above_limit", actuator=aid, code=self._state.code_of(aid))
            self.log.error("output found above its hard limit; disarm to ramp it down", actuator=aid)
        versions = sorted({a.calibration_version for a in self.actuators.values()})
        self._emit("start", armed=False, calibration_versions=versions)

    async def close(self) -> None:
        """Stop background work and the board threads; outputs stay as they are (the boards'
        watchdogs take over if no daemon comes back; a restarted daemon adopts them)."""
        await self._interlocks.stop()
        await self._supervisor.stop()
        await asyncio.to_thread(self._state.rack.stop)
        self._emit("stop")

    def heartbeat_interval_s(self) -> float:
        return self._supervisor.interval_s()

    async def heartbeat_once(self) -> None:
        """One heartbeat pass (see :mod:`meshwarden.supervision`)."""
        await self._supervisor.beat()

    async def recover(self, board_id: str, client: str | None = None) -> dict[str, Any]:
        return await self._supervisor.recover(board_id, client)

    async def interlocks_once(self) -> dict[str, str]:
        """Read every configured interlock now (see :mod:`meshwarden.interlocks`)."""
        return await self._interlocks.poll()

    # ------------------------------------------------------------------ arm, disarm, stop

    def over_limit(self) -> list[str]:
        """Actuators whose output is above their hard limit: found so at start (the limit was
        lowered while the boards held a higher code). Only moves toward zero are allowed then."""
        current = self._state.current_codes()
        return [aid for aid, a in self.actuators.items() if current[aid] > a.limit.hard_limit_code]

    async def arm(self, client: str | None = None) -> None:
        """Allow outputs to change; clears a latched emergency stop and the boards' fault flags."""
        stops_before = self._stops
        # Look first: a reset or a tripped watchdog must be noticed before clearing the flags
        # that show it, even if arming is then refused.
        await self.heartbeat_once()
        await self._interlocks.refuse_arm_if_open(client)  # a latching stop: closed contact + re-arm
        above = self.over_limit()
        if above:
            self._emit("refused", client=client, op="arm", reason="outputs above their limit", actuators=above)
            raise LimitRefused(
                f"cannot arm: {', '.join(above)} above the hard limit; disarm first (ramps to zero)", actuators=above
            )
        faulted = [b for b, s in self.boards.items() if s.faulted or s.zero_pending is not None]
        if faulted:
            self._emit("refused", client=client, op="arm", reason="faulted boards", boards=faulted)
            raise FaultedRefused(f"cannot arm: board(s) {', '.join(faulted)} faulted or unreachable", boards=faulted)
        results = await self._state.rack.each(lambda d: d.clear_faults())
        failed = {b: str(r) for b, r in results.items() if isinstance(r, BaseException)}
        if failed:
            raise FaultedRefused(f"cannot arm: {failed}", boards=sorted(failed))
        for board_id in self.boards:  # ramps start from what the boards really hold
            await self._supervisor.resync(board_id)
        doubtful = [b for b, s in self.boards.items() if s.doubt is not None]
        if doubtful:
            raise FaultedRefused(f"cannot arm: outputs of board(s) {', '.join(doubtful)} could not be read")
        if self._stops != stops_before:
            self._emit("refused", client=client, op="arm", reason="an emergency stop or disarm came during arm")
            raise NotArmedRefused("an emergency stop or disarm came while arming: not armed; arm again")
        self._state.estopped = False
        self._state.armed = True
        self._emit("arm", client=client)

    async def disarm(self, client: str | None = None) -> None:
        """Stop all motion (cooperatively), end every claim, ramp every output to zero within
        the guard's steps, then stay disarmed."""
        self._state.armed = False
        self._stops += 1
        self.claims.closing += 1  # no new held claim (lease, procedure) until the ramp down is done
        try:
            self.claims.end_all("disarm")
            await self.claims.idle()
            self.claims.end_all("disarm")  # anything held that got in while motion wound down
            claim = await self.claims.acquire("disarm", self.actuators, held=False, mover=self)
        except BaseException:
            self.claims.closing -= 1
            raise
        try:
            targets = {aid: 0 for aid in self.actuators}

            async def journal(plan: RampPlan) -> None:
                # Every output ends at 0 V, not only those this ramp moves: one a procedure lowered
                # with unjournaled steps still has its old target in the journal, which a restart
                # would then want restored.
                await self._durable([self._state.record(a, 0, None) for a in self.actuators], None, client)

            await self._motion.run(claim, targets, allow_disarmed=True, client=client, before_first_write=journal)
            for act in self.actuators.values():
                act.value = None  # the logical value is what the outputs mean now: unknown at 0 V
        finally:
            self.claims.release(claim)
            self.claims.closing -= 1
            self._emit("disarm", client=client)

    async def estop(self, client: str | None = None, reason: str = "") -> dict[str, str]:
        """Latch the emergency stop and zero every board now - faulted ones too - before any
        queued work. Never raises. A board that cannot confirm is retried at every heartbeat."""
        self._state.estopped = True
        self._state.armed = False
        self._stops += 1
        self.claims.closing += 1  # no new held claim while the boards are being zeroed
        # The journal's marker commits on its own thread while the boards are zeroed: the reply
        # below waits for it (briefly), so a stop that was answered is never undone by a restart.
        marked = asyncio.wrap_future(self.journal.mark_all_zero_async())
        marked.add_done_callback(lambda f: f.cancelled() or f.exception())  # a late failure is logged below, not lost
        try:
            self.claims.end_all("emergency stop")
            results = await self._state.rack.each(lambda d: d.emergency_zero(), priority=EMERGENCY)
        finally:
            self.claims.closing -= 1
        outcome = {}
        for board_id, result in results.items():
            board = self.boards[board_id]
            if isinstance(result, BaseException):
                board.zero_pending = str(result)
                outcome[board_id] = f"not confirmed: {result} (retried at every heartbeat; its watchdog will act)"
            else:
                board.zero_pending = None
                outcome[board_id] = "zero"
        zeroed = [a for a, act in self.actuators.items() if outcome.get(act.board.id) == "zero"]
        for aid in zeroed:
            self.actuators[aid].value = None
        # queued, not awaited: an emergency stop never waits on the disk (nor builds the rows)
        now = time.time()
        self.journal.record_targets_async(
            (self._state.record(a, 0, None, now) for a in zeroed), None, client, lazy=True
        )
        self._emit("estop", client=client, reason=reason, boards=outcome)
        # asyncio.wait, not wait_for: it never cancels the marker, and a cancellation of this task
        # arriving as its time runs out is not lost (Python 3.11's wait_for can swallow one, which
        # left an interlock watch that was being stopped running for ever).
        done, _ = await asyncio.wait({marked}, timeout=ESTOP_MARK_WAIT_S)
        failure = None if not done else marked.exception()
        if not done or failure is not None:  # a slow or failing disk: the boards are zero; say so, never raise
            detail = "not yet on disk" if not done else str(failure)
            asyncio.get_running_loop().call_soon(
                functools.partial(self.log.error, "emergency stop marker not journaled", error=detail)
            )
        # The log line waits its turn: a slow console or log file must not delay the reply.
        asyncio.get_running_loop().call_soon(
            functools.partial(self.log.warning, "emergency stop", reason=reason, boards=outcome)
        )
        return outcome

    # ------------------------------------------------------------------ requests

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
        """Validate a whole request without touching anything: actuator -> (code, logical value).
        Logical values are mapped through each table to the drive they need alone, then, where
        the calibration measured crosstalk, solved jointly with every neighbour's present drive
        (:mod:`meshwarden.crosstalk`); volts are taken as they are."""
        wanted: dict[str, tuple[str, float]] = {}
        for name, raw in values.items():
            actuator_id, _ = self.resolve(name)
            if actuator_id in wanted:
                raise UnknownTargetRefused(
                    f"'{name}' sets actuator {actuator_id} a second time in one request", target=name
                )
            if isinstance(raw, bool) or not isinstance(raw, int | float) or not math.isfinite(raw):
                raise UnreachableRefused(f"{name}: value must be a finite number, got {raw!r}", target=name)
            wanted[actuator_id] = (name, float(raw))
        drive = {a: raw if volts else self.actuators[a].map.volts_for(raw) for a, (_, raw) in wanted.items()}
        if not volts and self._crosstalk:
            neighbours = self._neighbour_volts(drive)
            drive = self._crosstalk.drive_volts(drive, neighbours)
            self._check_reached({a: raw for a, (_, raw) in wanted.items()}, {**neighbours, **drive})
        out: Prepared = {}
        for actuator_id, (_, raw) in wanted.items():
            act = self.actuators[actuator_id]
            target_volts = drive[actuator_id]
            code = volts_to_code(target_volts, act.board.full_scale_volts, act.board.dac_bits)
            if code == act.limit.hard_limit_code + 1 and target_volts <= act.limit.hard_limit_volts:
                code -= 1  # rounding to the nearest code must not step over the limit
            check_targets({actuator_id: act.limit}, {actuator_id: code})
            value = None if volts else raw
            if volts:
                try:
                    value = act.map.value_at(code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits))
                except MeshwardenError:
                    value = None
            out[actuator_id] = (code, value)
        if self._crosstalk:
            self._check_crosstalk_limits(out)
        return out

    def _check_crosstalk_limits(self, prepared: Prepared) -> None:
        """Rule 4 with the neighbours' share counted: no actuator the request moves or acts on may
        be driven, as its own V^2 plus its neighbours' shares, past its hard limit (which the
        configuration keeps below pull-in with the margin) - at any point of the ramp, bounded by
        taking each output at the higher of where it starts and where it ends. A neighbour another
        move is ramping counts at the higher of where it is and where that move ends."""
        present = self._state.current_codes(list(prepared))
        if all(code <= present[a] for a, (code, _) in prepared.items()):
            # It raises nothing, so it drives no actuator harder than now: always the way out, also
            # of a state that shares activated since show past a limit ("lower the neighbours").
            return
        moving = frozenset(prepared)
        driven = sorted(moving | self._crosstalk.acting_on(moving))
        by = {b for n in driven for b in self._crosstalk.shares.get(n, {})} - set(driven)
        highest = self._present_volts([*driven, *sorted(by)])
        ends = [{a: code for a, (code, _) in prepared.items()}, *self._ramps]  # moves under way end there
        for codes in ends:
            for aid in highest.keys() & codes.keys():
                board = self.actuators[aid].board
                highest[aid] = max(highest[aid], code_to_volts(codes[aid], board.full_scale_volts, board.dac_bits))
        for aid in driven:
            limit = self.actuators[aid].limit.hard_limit_volts
            equivalent = self._crosstalk.equivalent_volts(aid, highest)
            if equivalent > limit + 1e-9:
                raise LimitRefused(
                    f"{aid}: with its neighbours' crosstalk this request would drive it as {equivalent:.3f} V, "
                    f"above its {limit:g} V limit; lower the neighbours first",
                    actuator=aid,
                    equivalent_volts=equivalent,
                )

    def _check_reached(self, wanted: dict[str, float], volts: dict[str, float]) -> None:
        """Refuse a request its neighbours' crosstalk alone carries past (its drive came out at
        0 V): rule 6, nothing is silently clamped. Within REACH_TOLERANCE of the value it is met."""
        for aid, value in wanted.items():
            act = self.actuators[aid]
            meaning = self._meaning(aid, volts)
            reached = math.inf if meaning is None else meaning
            if not abs(self._miss(aid, reached, value)) <= REACH_TOLERANCE:
                by = ", ".join(sorted(self._crosstalk.shares.get(aid, {})))
                raise UnreachableRefused(
                    f"{aid}: {value:g} cannot be reached while its neighbours ({by}) are driven as they are: "
                    f"their crosstalk alone gives {reached:.6g}; lower them first, or ask for that much or more",
                    actuator=aid,
                    reachable=[reached, act.map.reachable()[1]],
                )

    def _neighbour_volts(self, moving: dict[str, float]) -> dict[str, float]:
        """Present volts of every actuator whose crosstalk acts on one of ``moving``."""
        shares = self._crosstalk.shares
        return self._present_volts(sorted({by for on in moving for by in shares.get(on, {}) if by not in moving}))

    def _present_volts(self, names: list[str]) -> dict[str, float]:
        codes = self._state.current_codes(names)
        return {
            n: code_to_volts(codes[n], self.actuators[n].board.full_scale_volts, self.actuators[n].board.dac_bits)
            for n in names
        }

    def check(self, values: dict[str, float], *, volts: bool = False, owner: str | None = None) -> Prepared:
        """Validate a whole request against the calibration, the limits, the claims and the
        current state, without touching anything; the result can be handed to :meth:`set`."""
        if self.estopped:
            raise NotArmedRefused("emergency stop is latched: arm again first")
        prepared = self.prepare(values, volts=volts)
        self._check_state(prepared, owner)
        return prepared

    def _check_state(self, prepared: Prepared, owner: str | None = None) -> None:
        if self.estopped:
            raise NotArmedRefused("emergency stop is latched: arm again first")
        current = self._state.current_codes(list(prepared))
        if not self.armed and any(code > current[a] for a, (code, _) in prepared.items()):
            raise NotArmedRefused("outputs may only move toward zero while disarmed: arm first")
        self.claims.check(owner or "local", prepared)
        blocked = {b: why for b, why in self._state.unavailable({self.actuators[a].board.id for a in prepared}).items()}
        if blocked and any(not why.startswith("outputs in doubt") for why in blocked.values()):
            text = ", ".join(f"{b} ({why})" for b, why in blocked.items())
            raise FaultedRefused(f"board(s) {text}: faulted or waiting for restore", boards=sorted(blocked))

    async def set(
        self,
        values: dict[str, float],
        *,
        volts: bool = False,
        client: str | None = None,
        request: str | None = None,
        progress: Progress | None = None,
        prepared: Prepared | None = None,
        owner: str | None = None,
        stop: Callable[[Claim], None] | None = None,
    ) -> dict[str, dict[str, Any]]:
        """Apply a whole request, or refuse it whole before the first write. ``prepared`` (from
        :meth:`check`) spares mapping the values twice; the state is checked again here anyway.
        ``owner`` is whose claim the motion runs under (default: ``client``); ``stop`` is given
        the motion's claim, so the caller can stop it cooperatively."""
        owner = owner or client or "local"
        try:
            if prepared is None:
                prepared = self.check(values, volts=volts, owner=owner)
            else:
                self._check_state(prepared, owner)
            claim = await self.claims.acquire(owner, prepared, held=False, mover=self)
        except MeshwardenError as exc:
            self._emit("refused", client=client, op="set", code=exc.code, reason=exc.message)
            raise
        if stop is not None:
            stop(claim)
        try:
            self._check_state(prepared, owner)  # again: the state may have changed while we waited
            return await self._move(claim, prepared, client=client, request=request, progress=progress)
        finally:
            self.claims.release(claim)

    async def _move(
        self,
        claim: Claim,
        prepared: Prepared,
        *,
        client: str | None,
        request: str | None = None,
        progress: Progress | None = None,
        journal: bool = True,
    ) -> dict[str, dict[str, Any]]:
        before = self._state.current_codes(list(prepared))

        async def record(plan: RampPlan) -> None:
            if journal:
                now = time.time()
                rows = [self._state.record(a, code, value, now) for a, (code, value) in prepared.items()]
                await self._durable(rows, request, client)

        with self._under_way(prepared) as ends:
            try:
                await self._motion.run(
                    claim,
                    ends,
                    allow_disarmed=not self.armed,
                    client=client,
                    progress=progress,
                    before_first_write=record,
                )
            finally:
                after = self._state.current_codes(list(prepared))
                for aid, (code, value) in prepared.items():
                    if after[aid] == code:
                        self.actuators[aid].value = self._settled(aid, value)
                    elif after[aid] != before[aid]:
                        self.actuators[aid].value = None
                moved = frozenset(a for a in prepared if after[a] != before[a])
                self._refresh_neighbours(moved, frozenset(prepared))
        return {aid: self.describe(aid) for aid in prepared}

    @contextmanager
    def _under_way(self, prepared: Prepared) -> Iterator[dict[str, int]]:
        """List where a move ends while it runs, after checking rule 4 with crosstalk once more; nothing
        is awaited between the two, so a neighbour's move checked while this one waited for its claim
        (not knowing where this one ends, nor this one where it does) cannot also pass. Yields the codes."""
        if self._crosstalk:
            self._check_crosstalk_limits(prepared)
        ends = {a: code for a, (code, _) in prepared.items()}
        self._ramps.append(ends)
        try:
            yield ends
        finally:
            self._ramps.remove(ends)

    def _refresh_neighbours(self, moved: frozenset[str], requested: frozenset[str]) -> None:
        """What the actuators a move's crosstalk acts on (and that it did not set) mean now - rule
        7: the value reported is the chip's as the model has it, not the one asked before."""
        if not self._crosstalk or not moved:
            return
        for aid in self._crosstalk.acting_on(moved) - requested:
            act = self.actuators[aid]
            if act.value is None:
                continue
            act.value = self._value_now(aid)

    def _settled(self, aid: str, asked: float | None) -> float | None:
        """The value of an actuator that reached its target code: the one asked, unless its
        neighbours' crosstalk makes the drive mean another (a neighbour another request moved
        meanwhile, or a request in volts, whose value is its own table's at its own volts)."""
        if not self._crosstalk.shares.get(aid):
            return asked
        meaning = self._value_now(aid)
        if asked is None or meaning is None:
            return meaning
        return asked if abs(self._miss(aid, meaning, asked)) <= REACH_TOLERANCE else meaning

    def _value_now(self, aid: str) -> float | None:
        """What ``aid`` means at the volts it and its neighbours hold now."""
        return self._meaning(aid, self._present_volts([aid, *self._crosstalk.shares.get(aid, {})]))

    def _miss(self, aid: str, reached: float, wanted: float) -> float:
        """How far ``reached`` is from ``wanted`` (a phase's the short way round the circle)."""
        miss = reached - wanted
        if self.actuators[aid].config.kind == "phase" and math.isfinite(miss):
            miss = (miss + math.pi) % (2 * math.pi) - math.pi
        return miss

    def _meaning(self, aid: str, volts: dict[str, float]) -> float | None:
        """The logical value ``aid`` has with every actuator at ``volts``, its neighbours' crosstalk
        counted (None: outside its table)."""
        try:
            return self.actuators[aid].map.value_at(self._crosstalk.equivalent_volts(aid, volts))
        except MeshwardenError:
            return None

    async def _durable(self, rows: list[Any], request: str | None, client: str | None) -> None:
        """Journal targets and wait until they are synced (the writer thread commits them)."""
        await asyncio.shield(asyncio.wrap_future(self.journal.record_targets_async(rows, request, client)))

    async def move_claimed(
        self,
        claim: Claim,
        values: dict[str, float],
        *,
        volts: bool = False,
        journal: bool = True,
        progress: Progress | None = None,
    ) -> dict[str, dict[str, Any]]:
        """A move under a held claim (what :meth:`Claim.move` calls)."""
        claim.check()
        if claim.ended or not claim.held:
            raise NotArmedRefused(f"{claim.id} has ended")
        prepared = self.prepare(values, volts=volts)
        outside = sorted(set(prepared) - claim.actuators)
        if outside:
            raise UnknownTargetRefused(f"{', '.join(outside)} not held by {claim.id}", actuators=outside)
        self._check_state(prepared, claim.owner)
        return await self._move(claim, prepared, client=claim.owner, journal=journal, progress=progress)

    @asynccontextmanager
    async def claim(
        self, actuators: list[str], *, owner: str, purpose: str = "", ttl_s: float | None = None
    ) -> AsyncIterator[Claim]:
        """Hold the motion of ``actuators`` (ids or gate ids) for a procedure::

            async with controller.claim(["p03", "g05"], owner="calibrate:job-4") as c:
                await c.move({"p03": 1.2})
                levels = await c.read_monitors()

        Other owners' motion on them is refused ``busy`` while it is held; disarm and estop end it."""
        ids: list[str] = []
        for target in actuators:
            if target in self.actuators:
                ids.append(target)
            elif target in self.gates:
                ids += [self.gates[target].coupler, self.gates[target].phase]
            else:
                raise UnknownTargetRefused(f"unknown target '{target}' (an actuator or gate id)", target=target)
        claim = await self.claims.acquire(owner, ids, held=True, ttl_s=ttl_s, purpose=purpose, mover=self)
        self._emit("claim", client=owner, claim=claim.id, purpose=purpose, actuators=sorted(ids)[:32])
        try:
            yield claim
        finally:
            self.claims.release(claim)
            self._emit("release", client=owner, claim=claim.id)

    async def restore(self, client: str | None = None) -> dict[str, dict[str, Any]]:
        """Ramp boards that were reset (or tripped) back to their journaled targets; needs arming."""
        if not self.armed:
            raise NotArmedRefused("restore needs the daemon armed")
        waiting = [b for b, s in self.boards.items() if s.needs_restore and not s.faulted]
        journaled = self.journal.latest_targets()
        targets = {a: r for a, r in journaled.items() if a in self.actuators and self.actuators[a].board.id in waiting}
        claim = await self.claims.acquire(client or "local", targets, held=False, mover=self)
        try:
            # Rule 4 as for any move: the journaled targets with what the neighbours hold now (or
            # another move will end at) must not drive an actuator past its limit.
            with self._under_way({a: (r.code, r.value) for a, r in targets.items()}) as ends:
                for b in waiting:  # the restore itself is what these boards wait for
                    self.boards[b].needs_restore = False
                try:
                    await self._motion.run(claim, ends, allow_disarmed=False)
                except BaseException:
                    for b in waiting:
                        self.boards[b].needs_restore = True
                    raise
            for aid, record in targets.items():
                self.actuators[aid].value = record.value
        finally:
            self.claims.release(claim)
        self._emit("restore", client=client, boards=waiting)
        return {aid: self.describe(aid) for aid in targets}

    # ------------------------------------------------------------------ calibration versions

    def _tables_of(self, version: str) -> dict[str, CalibrationTable]:
        if version == BASE_VERSION:
            return {aid: load_calibration(a.config.calibration) for aid, a in self.actuators.items()}
        tables = self.calibrations.tables(version)
        for aid, table in tables.items():
            if aid not in self.actuators or table.actuator != aid or table.kind != self.actuators[aid].config.kind:
                raise CalibrationError(f"calibration version '{version}': table {aid} does not fit this chip")
        return tables

    def _crosstalk_of(self, version: str) -> CrosstalkShares:
        if version == BASE_VERSION:
            return CrosstalkShares()
        data = self.calibrations.manifest(version).get("crosstalk")
        return CrosstalkShares.from_data(data, set(self.actuators), f"calibration version '{version}'")

    @property
    def crosstalk(self) -> CrosstalkShares:
        """The crosstalk shares in force (measured with the active calibration version)."""
        return self._crosstalk

    def active_tables(self) -> dict[str, CalibrationTable]:
        """The table in force for every actuator."""
        return {aid: a.map.table for aid, a in self.actuators.items()}

    def _swap_tables(
        self, tables: dict[str, CalibrationTable], crosstalk: CrosstalkShares
    ) -> dict[str, dict[str, float | None]]:
        """Install tables and the shares measured with them; returns the actuators whose present
        volts now mean another value (their neighbours' crosstalk under the new shares counted) -
        every actuator, not only those with a table here: the shares act on them all."""
        before = {aid: act.value for aid, act in self.actuators.items()}
        for aid, table in tables.items():
            act = self.actuators[aid]
            act.map = ActuatorMap(aid, act.config.kind, table, act.limit.hard_limit_volts)
            act.calibration_version, act.calibration_origin = table.version, table.origin
        self._crosstalk = crosstalk
        changed: dict[str, dict[str, float | None]] = {}
        for aid, previous in before.items():
            if previous is None:
                continue
            meaning = self._value_now(aid)
            if meaning is None or abs(meaning - previous) > 1e-6:
                changed[aid] = {"volts": self._present_volts([aid])[aid], "before": previous, "now": meaning}
            self.actuators[aid].value = meaning
        return changed

    async def activate_calibration(self, version: str, client: str | None = None) -> dict[str, Any]:
        """Switch to a stored calibration version (or ``config``) atomically under a claim on the
        actuators it covers: no output moves; the next request maps through the new tables."""
        tables = self._tables_of(version)
        crosstalk = self._crosstalk_of(version)
        # Every actuator, not only those with a table in it: its shares change what any may mean,
        # and which move rule 4 allows, so no move may be under way across the switch.
        async with self.claim(list(self.actuators), owner=client or "local", purpose="calibration switch"):
            changed = self._swap_tables(tables, crosstalk)
            self.calibrations.set_active(version)
            self._emit("calibration_activated", client=client, version=version, changed=sorted(changed)[:32])
        return {"version": version, "activated": True, "changed": changed}

    # ------------------------------------------------------------------ reading

    def describe(self, actuator_id: str) -> dict[str, Any]:
        return self._state.describe(actuator_id)

    def board_states(self) -> dict[str, dict[str, Any]]:
        """Per board: boot count, waiting for restore, faulted, in doubt, zero pending, error rate."""
        return {
            b: {
                "boot_count": s.boot_count,
                "needs_restore": s.needs_restore,
                "faulted": s.faulted,
                "uncertain": s.doubt if s.identity is not None else None,
                "zero_pending": s.zero_pending,
                "error_rate": round(s.driver.error_rate, 4),
                "interlock": (s.interlock or "not read yet") if s.config.interlock else None,
            }
            for b, s in self.boards.items()
        }

    def snapshot(self) -> dict[str, Any]:
        """The state as ``get --json`` reports it."""
        return {
            "armed": self.armed,
            "estopped": self.estopped,
            "boards": self.board_states(),
            "actuators": {aid: self.describe(aid) for aid in self.actuators},
        }

    async def read_monitors(self, average: int = 1, integration_s: float = 1e-3) -> dict[str, dict[str, float]]:
        """Every monitor in amps (photocurrent), watts (optical, by responsivity) and mean ADC counts."""
        full_scale = {b: s.identity.adc_full_scale_volts for b, s in self.boards.items() if s.identity is not None}
        return await acquire_monitors(self._state.rack, self.config, full_scale, average, integration_s)

    async def read_sense(self) -> dict[str, float]:
        """The boards' own measurement of every wired output, in volts."""
        return await read_sense(self._state.rack, self.config.chip.actuators)
