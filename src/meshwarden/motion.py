"""Motion: plan -> journal -> execute, under a claim, never planning from a belief.

Rules kept here (docs/architecture.md, rules 2, 3 and 7):

* Plans start from the codes each board was **seen** to hold (its driver's record, updated only
  by verified acknowledgements, in the board's own order). A board in doubt is re-read first;
  if the re-read fails, motion on it is refused (``uncertain``) until a read succeeds.
* After any write that did not end in a verified acknowledgement (timeout, NAK, readback
  mismatch, link loss, cancellation, emergency abort) the board is re-read before the claim
  is released.
* A step carries only the channels the plan moves: contiguous runs of planned channels, one
  write each, never a block padded with codes nobody asked for.
* The state (estop, armed, the claim's stop, faulted / waiting / in doubt boards) is checked
  again before every step. A stop request ends the motion between steps; the write in flight
  always completes and is recorded, even when the awaiting task is cancelled.
* On the board's own thread, just before writing, each channel's step is checked against the
  codes the board was seen to hold, and the dwell since the channel's last verified change is
  waited out: the last gate, independent of anything the event loop believed.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Awaitable, Callable

from meshwarden.claims import Claim
from meshwarden.drivers.base import BoardDriver
from meshwarden.errors import (
    AbortedError,
    FaultedRefused,
    LimitRefused,
    LinkError,
    MeshwardenError,
    NotArmedRefused,
    StoppedRefused,
    UncertainRefused,
)
from meshwarden.guard import RampPlan, plan_ramp
from meshwarden.rackstate import RackState

Progress = Callable[[int, int], None]
MAX_WORKER_WAIT_S = 0.5  # the board thread waits out at most this much dwell itself
PLAN_IN_THREAD_ABOVE = 32  # actuators; planning more (the dynamic check per step) takes milliseconds


class Motion:
    """Executes ramp plans for the controller."""

    def __init__(self, state: RackState) -> None:
        self.state = state

    # ------------------------------------------------------------------ doubt

    async def reread(self, board_id: str) -> bool:
        """Read every output of a board into its record; False (and an event) if it fails."""
        try:
            await self.state.rack.call(board_id, lambda d: d.read_codes(0, d.config.outputs))
        except MeshwardenError as exc:
            self.state.emit("uncertain", board=board_id, error=str(exc))
            self.state.log.error("outputs in doubt; motion refused on this board until a read succeeds", board=board_id)
            return False
        return True

    async def make_certain(self, board_ids: set[str]) -> None:
        """Re-read boards in doubt; refuse if any stays in doubt."""
        for board_id in sorted(board_ids):
            state = self.state.boards[board_id]
            if state.identity is not None and not state.faulted and state.doubt is not None:
                await self.reread(board_id)

    def check_boards(self, board_ids: set[str]) -> None:
        blocked = self.state.unavailable(board_ids)
        if blocked:
            text = "; ".join(f"{b}: {why}" for b, why in blocked.items())
            doubt_only = all(why.startswith("outputs in doubt") for why in blocked.values())
            cls = UncertainRefused if doubt_only else FaultedRefused
            raise cls(f"board(s) not available for motion: {text}", boards=sorted(blocked))

    # ------------------------------------------------------------------ run

    async def run(
        self,
        claim: Claim,
        targets: dict[str, int],
        *,
        allow_disarmed: bool,
        client: str | None = None,
        progress: Progress | None = None,
        before_first_write: Callable[[RampPlan], Awaitable[None]] | None = None,
    ) -> RampPlan:
        """Ramp ``targets`` (codes) under ``claim``; ``before_first_write`` journals the plan."""
        boards = {self.state.actuators[a].board.id for a in targets}
        await self.make_certain(boards)
        self.check_boards(boards)
        current = self.state.current_codes(list(targets))
        if len(targets) > PLAN_IN_THREAD_ABOVE:  # a large plan off the loop: estop is served meanwhile
            plan = await asyncio.to_thread(plan_ramp, self.state.limits, current, targets)
        else:
            plan = plan_ramp(self.state.limits, current, targets)
        if before_first_write is not None:
            if plan.steps:
                # Again before journaling: an estop or stop may have come while planning or
                # re-reading; targets queued after an estop's zeros would outlive it in the journal.
                # Nothing awaits between this check and the journal's queue.
                self._check_step(claim, plan.steps[0].codes, allow_disarmed)
            await before_first_write(plan)
        last_step = -float("inf")
        for index, step in enumerate(plan.steps):
            ready = max(self._ready_at(a) for a in step.codes)
            if index > 0:
                ready = max(ready, last_step + step.dwell_before_s)
            await claim.pause_until(ready)
            self._check_step(claim, step.codes, allow_disarmed)
            await self._write_step(step.codes, client)
            last_step = time.monotonic()
            if progress is not None:
                progress(index + 1, len(plan.steps))
        return plan

    def _ready_at(self, actuator_id: str) -> float:
        act = self.state.actuators[actuator_id]
        driver = self.state.boards[act.board.id].driver
        return driver.written_at(act.config.output.index) + act.limit.dwell_s

    def _check_step(self, claim: Claim, codes: dict[str, int], allow_disarmed: bool) -> None:
        if self.state.estopped:
            raise StoppedRefused("motion stopped: emergency stop")
        claim.check()
        if not self.state.armed and not allow_disarmed:
            raise StoppedRefused("motion stopped: the daemon was disarmed")
        current = self.state.current_codes(list(codes))
        if not self.state.armed and any(code > current[a] for a, code in codes.items()):
            raise NotArmedRefused("outputs may only move toward zero while disarmed: arm first")
        self.check_boards({self.state.actuators[a].board.id for a in codes})

    # ------------------------------------------------------------------ one step

    async def _write_step(self, codes: dict[str, int], client: str | None) -> None:
        by_board: dict[str, dict[int, int]] = {}
        checks: dict[str, dict[int, tuple[int, float]]] = {}
        for aid, code in codes.items():
            act = self.state.actuators[aid]
            ch = act.config.output.index
            by_board.setdefault(act.board.id, {})[ch] = code
            checks.setdefault(act.board.id, {})[ch] = (act.limit.step_limit_code, act.limit.dwell_s)
        futures = {b: self.state.rack.submit(b, _step_writer(ch, checks[b])) for b, ch in by_board.items()}
        gathered = asyncio.gather(*(asyncio.wrap_future(f) for f in futures.values()), return_exceptions=True)
        cancelled = False
        while True:  # the writes run in the boards' threads: wait for them even if cancelled
            try:
                results = await asyncio.shield(gathered)
                break
            except asyncio.CancelledError:
                cancelled = True
        errors: list[tuple[str, BaseException]] = []
        for board_id, result in zip(futures, results, strict=True):
            if isinstance(result, asyncio.CancelledError):
                result = AbortedError(f"board {board_id}: step dropped by an emergency stop", board=board_id)
            if isinstance(result, BaseException):
                errors.append((board_id, result))
        for board_id, exc in errors:
            self.state.emit(
                "write_failed", client=client, board=board_id, error=str(exc), code=getattr(exc, "code", "error")
            )
            if not self.state.estopped and self.state.boards[board_id].doubt is not None:
                await self.reread(board_id)  # rule 7: believe the board, not the plan
        if cancelled:
            raise asyncio.CancelledError
        if errors:
            board_id, exc = errors[0]
            if self.state.estopped:
                raise StoppedRefused("motion stopped: emergency stop") from exc
            if isinstance(exc, MeshwardenError):
                raise exc
            raise LinkError(f"board {board_id}: {exc}") from exc


def _runs(channels: dict[int, int]) -> list[tuple[int, tuple[int, ...]]]:
    """Contiguous runs of planned channels: [(first, codes), ...]."""
    runs: list[tuple[int, list[int]]] = []
    for ch in sorted(channels):
        if runs and runs[-1][0] + len(runs[-1][1]) == ch:
            runs[-1][1].append(channels[ch])
        else:
            runs.append((ch, [channels[ch]]))
    return [(first, tuple(codes)) for first, codes in runs]


def _step_writer(
    channels: dict[int, int], checks: dict[int, tuple[int, float]]
) -> Callable[[BoardDriver], list[tuple[int, ...]]]:
    """The step as it runs on the board's thread, after every earlier transaction of the board."""

    def write(driver: BoardDriver) -> list[tuple[int, ...]]:
        held, doubt = driver.outputs_seen()
        if doubt is not None:
            raise UncertainRefused(f"board {driver.config.id}: outputs in doubt ({doubt})", board=driver.config.id)
        wait = 0.0
        for ch, code in channels.items():
            step_limit, dwell_s = checks[ch]
            if abs(code - held[ch]) > step_limit:
                raise LimitRefused(
                    f"board {driver.config.id}: output {ch} would step {held[ch]} -> {code}, more than its "
                    f"step limit of {step_limit} codes",
                    board=driver.config.id,
                    channel=ch,
                )
            if code != held[ch]:
                wait = max(wait, driver.written_at(ch) + dwell_s - time.monotonic())
        if wait > MAX_WORKER_WAIT_S:
            raise LimitRefused(f"board {driver.config.id}: a step came {wait:.3f} s before its dwell ended")
        if wait > 0 and driver.abort.wait(wait):  # an emergency stop queued meanwhile goes first
            raise AbortedError(f"board {driver.config.id}: step dropped by an emergency stop", board=driver.config.id)
        return [driver.write_codes(first, codes) for first, codes in _runs(channels)]

    return write
