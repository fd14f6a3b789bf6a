"""Board supervision: bring-up and adoption, the heartbeat, recovery and resynchronisation.

The heartbeat feeds every watchdog and looks for what changed under us: a board that was reset
(boot counter), a watchdog that acted while we stalled, a link that faulted, a board that came
up late, outputs in doubt after a failed write (re-read until a read succeeds), and a board an
emergency stop could not confirm at zero (its zero is retried, faulted or not, until it is
confirmed; its watchdog is deliberately not fed meanwhile, so the board's own watchdog acts
behind us if the link never comes back).
"""

from __future__ import annotations

import asyncio
from collections.abc import Awaitable, Callable
from typing import Any

from meshwarden.drivers.rack import EMERGENCY
from meshwarden.errors import AbortedError, FaultedRefused, MeshwardenError, UnknownTargetRefused
from meshwarden.journal import TargetRecord
from meshwarden.motion import Motion
from meshwarden.rackstate import BoardState, RackState
from meshwarden.startup import BoardFound, adopt, bring_up, journaled_codes, stop_never_reached


class Supervisor:
    """Keeps the controller's picture of each board true."""

    def __init__(self, state: RackState, motion: Motion, estop: Callable[..., Awaitable[Any]]) -> None:
        self.state = state
        self.motion = motion
        self.estop = estop
        self._task: asyncio.Task[None] | None = None

    # ------------------------------------------------------------------ start and stop

    async def start(self) -> None:
        """Open every board, check it is the board the configuration describes, configure its
        watchdog and monitor gains, and adopt its outputs without writing any."""
        s = self.state
        s.rack.start()
        journaled = s.journal.latest_targets()
        boots = s.journal.board_boot_counts()
        chip = s.config.chip
        results = await s.rack.each(lambda driver: bring_up(driver, chip))
        for board_id, result in results.items():
            board = s.boards[board_id]
            if isinstance(result, BaseException):
                board.faulted = True
                s.emit("board_unreachable", board=board_id, error=str(result))
                s.log.error("board unreachable at start", board=board_id, error=str(result))
                continue
            board.identity, board.boot_count = result.identity, result.identity.boot_count
            self._adopt(board, journaled, boots.get(board_id), result)
            s.journal.record_board(board_id, result.identity.boot_count, result.identity.serial)
        for aid, record in journaled.items():
            if aid in s.actuators and s.code_of(aid) == record.code:
                s.actuators[aid].value = record.value
        self._task = asyncio.create_task(self._loop(), name="heartbeat")

    def _adopt(
        self, board: BoardState, journaled: dict[str, TargetRecord], old_boot: int | None, found: BoardFound
    ) -> None:
        board_id = board.config.id
        verdict = adopt(found, journaled_codes(board_id, board.config.outputs, journaled), old_boot)
        board.needs_restore = verdict.needs_restore
        detail: dict[str, Any] = {"board": board_id}
        if verdict.kind == "adopted":
            detail["channels_on"] = sum(1 for c in found.codes if c)
        elif verdict.kind == "board_reset_detected":
            detail.update(old_boot=old_boot, boot=found.identity.boot_count)
        elif verdict.kind == "adoption_mismatch":
            detail["channels"] = list(verdict.channels[:16])
        self.state.emit(verdict.kind, **detail)
        if verdict.kind == "adoption_mismatch" and stop_never_reached(board_id, found, journaled):
            # The stop's answer promised its zero would be retried and the watchdog left to act:
            # it stays latched, the board is not fed, and the heartbeat zeroes it (rule 4).
            board.zero_pending = "an emergency stop before this start never reached it"
            self.state.estopped = True
            self.state.emit("estop_unfinished", board=board_id)
            self.state.log.error("an emergency stop never reached this board: zeroing it now", board=board_id)
        if verdict.kind != "adopted":
            self.state.log.warning(
                "board not adopted; outputs left as found",
                board=board_id,
                reason=verdict.kind,
                needs_restore=board.needs_restore,
            )

    async def stop(self) -> None:
        if self._task is not None:
            self._task.cancel()
            await asyncio.gather(self._task, return_exceptions=True)
            self._task = None

    @property
    def task(self) -> asyncio.Task[None] | None:
        return self._task

    # ------------------------------------------------------------------ heartbeat

    def interval_s(self) -> float:
        return max(0.2, min(min(b.watchdog.timeout_s for b in self.state.config.rack.boards) / 4.0, 5.0))

    async def _loop(self) -> None:
        while True:
            await asyncio.sleep(self.interval_s())
            await self.beat()

    async def beat(self) -> None:
        """One heartbeat pass over the rack (see the module docstring)."""
        s = self.state
        await self._retry_pending_zeros()
        absent = [b for b, st in s.boards.items() if st.identity is None and st.zero_pending is None]
        if absent:
            await self.bring_up_late(absent)
        present = [
            b for b, st in s.boards.items() if st.identity is not None and not st.faulted and st.zero_pending is None
        ]
        results = await s.rack.each(lambda d: (d.heartbeat(), d.status()), boards=present)
        for board_id, result in results.items():
            board = s.boards[board_id]
            if isinstance(result, asyncio.CancelledError | AbortedError):
                continue  # an emergency stop took the board meanwhile
            if isinstance(result, BaseException):
                s.emit("link_fault", board=board_id, error=str(result))
                if s.rack.drivers[board_id].faulted and not board.faulted:
                    board.faulted = True
                    s.emit("board_faulted", board=board_id)
                    await self.estop(reason=f"board {board_id} faulted")
                continue
            beat, status = result
            if board.boot_count is not None and beat.boot_count != board.boot_count:
                await self._board_was_reset(board, beat.boot_count)
            elif status.watchdog_tripped and not board.needs_restore:
                # The board acted on its own (we were stalled): its outputs are not what we think.
                s.emit("watchdog_tripped", board=board_id)
                await self.resync(board_id)
                board.needs_restore = True
            elif board.doubt is not None:
                await self.motion.reread(board_id)

    async def _retry_pending_zeros(self) -> None:
        """Boards an emergency stop could not confirm at zero: try their zero again, faulted or not."""
        s = self.state
        pending = [b for b, st in s.boards.items() if st.zero_pending is not None]
        if not pending:
            return
        results = await s.rack.each(lambda d: d.emergency_zero(), boards=pending, priority=EMERGENCY)
        for board_id, result in results.items():
            if isinstance(result, BaseException):
                s.boards[board_id].zero_pending = str(result)
                continue
            s.boards[board_id].zero_pending = None
            s.forget_values(board_id)
            # The board holds zeros now: so must the journal (a restart would offer to restore the
            # targets from before the stop). Queued, not awaited, as the estop's own zeros.
            on_board = [a for a, act in s.actuators.items() if act.board.id == board_id]
            s.journal.record_targets_async([s.record(a, 0, None) for a in on_board], None, None)
            s.emit("estop_confirmed", board=board_id)
            s.log.warning("emergency stop confirmed late: board at zero", board=board_id)

    async def bring_up_late(self, boards: list[str]) -> None:
        s = self.state
        chip = s.config.chip
        journaled = s.journal.latest_targets()
        boots = s.journal.board_boot_counts()
        results = await s.rack.each(lambda driver: bring_up(driver, chip), boards=boards)
        for board_id, result in results.items():
            if isinstance(result, BaseException):
                continue  # still away; the driver's backoff paces the retries
            board = s.boards[board_id]
            board.identity, board.boot_count = result.identity, result.identity.boot_count
            board.faulted = False
            self._adopt(board, journaled, boots.get(board_id), result)
            s.journal.record_board(board_id, result.identity.boot_count, result.identity.serial)
            s.emit("board_up", board=board_id, boot=result.identity.boot_count)

    async def recover(self, board_id: str, client: str | None = None) -> dict[str, Any]:
        """After the operator has fixed a faulted board's link: forget its error history, bring
        it up again (no writes) and adopt it or mark it for restore. Needs the daemon disarmed."""
        s = self.state
        if board_id not in s.boards:
            raise UnknownTargetRefused(f"unknown board '{board_id}'", target=board_id)
        if s.armed:
            raise FaultedRefused("disarm before recovering a board")
        board = s.boards[board_id]
        await s.rack.call(board_id, lambda d: d.recover())
        board.identity = None
        await self.bring_up_late([board_id])
        if board.identity is None:
            board.faulted = True
            raise FaultedRefused(
                f"board {board_id} still does not answer; it is tried again at every heartbeat", board=board_id
            )
        s.emit("recover", client=client, board=board_id)
        return {"board": board_id, "boot_count": board.boot_count, "needs_restore": board.needs_restore}

    async def resync(self, board_id: str) -> None:
        """Believe the board: read back every output; logical values of changed outputs are lost."""
        s = self.state
        before = s.boards[board_id].codes
        if not await self.motion.reread(board_id):
            return
        after = s.boards[board_id].codes
        changed = {i for i, (a, b) in enumerate(zip(after, before, strict=True)) if a != b}
        if changed:
            s.emit("resync", board=board_id, channels=sorted(changed)[:16])
            s.forget_values(board_id, changed)

    async def _board_was_reset(self, board: BoardState, boot: int) -> None:
        s = self.state
        board_id = board.config.id
        old = board.boot_count
        board.boot_count = boot
        board.needs_restore = True
        s.forget_values(board_id)
        s.journal.record_board(board_id, boot, board.identity.serial if board.identity else None)
        s.emit("board_reset_detected", board=board_id, old_boot=old, boot=boot)
        s.log.error("board was reset; its outputs are at zero until restore", board=board_id)
        try:
            await s.rack.call(
                board_id, lambda d: d.configure_watchdog(board.config.watchdog.timeout_s, board.config.watchdog.action)
            )
        except MeshwardenError as exc:
            s.emit("link_fault", board=board_id, error=str(exc))
        await self.motion.reread(board_id)
