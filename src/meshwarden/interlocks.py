"""Hardware interlocks: watch every configured interlock input, stop the rack when one opens.

A rack beside a probe station has contacts that must stop everything: a door switch, a latching
emergency-stop button, a laser shutter contact. Each is wired to a board's interlock input
(``interlock: true`` on the board); the board only reports it, and this room of the controller
acts on it. The practice followed is the latching stop of ISO 13850 (emergency stop function):

* the stop is immediate - the first poll that sees a contact open calls the controller's
  emergency stop, which zeroes every board, not only the one that reported it;
* the stop latches - resetting the contact does not restart anything; motion stays refused;
* restarting needs two deliberate acts: the contact closed again *and* an operator's ``arm``,
  which is refused while any configured interlock is open or cannot be read.

An interlock that cannot be read (its board does not answer) counts as open: a safety input
whose state is unknown is treated as demanding the stop (fail-safe). Interlocks are polled on
their own loop (``safety.interlock_poll_s``, 50 ms by default), faster than the heartbeat,
which follows the watchdog timeout.
"""

from __future__ import annotations

import asyncio
from collections.abc import Awaitable, Callable
from typing import Any

from meshwarden.errors import AbortedError, InterlockOpenRefused
from meshwarden.rackstate import RackState

CLOSED, OPEN = "closed", "open"


class InterlockWatch:
    """Polls the configured interlocks; opens latch an emergency stop."""

    def __init__(self, state: RackState, estop: Callable[..., Awaitable[Any]]) -> None:
        self.state = state
        self.estop = estop
        self.boards = [b.id for b in state.config.rack.boards if b.interlock]
        self._task: asyncio.Task[None] | None = None

    async def start(self) -> None:
        """Read every interlock once before the daemon answers (so its first ``status`` already
        says whether each is closed), then keep polling in the background."""
        if not self.boards or self._task is not None:
            return
        try:
            await self.poll()
        except Exception as exc:  # a failed first read is reported; the loop keeps trying
            self.state.log.error("interlock poll failed", error=repr(exc))
        self._task = asyncio.create_task(self._loop(), name="interlocks")

    async def stop(self) -> None:
        if self._task is not None:
            self._task.cancel()
            await asyncio.gather(self._task, return_exceptions=True)
            self._task = None

    async def _loop(self) -> None:
        while True:
            await asyncio.sleep(self.state.config.safety.interlock_poll_s)
            try:
                await self.poll()
            except Exception as exc:  # the watch must outlive any one bad pass
                self.state.log.error("interlock poll failed", error=repr(exc))

    async def poll(self) -> dict[str, str]:
        """Read every configured interlock once; stop the rack if one has opened."""
        if not self.boards:
            return {}
        boards = self.state.boards
        up = [b for b in self.boards if boards[b].identity is not None and not boards[b].faulted]
        for b in self.boards:
            if b not in up:  # an absent or faulted board: the heartbeat deals with it (a fault stops)
                boards[b].interlock = "board not up" if boards[b].identity is None else "board faulted"
        results = await self.state.rack.each(lambda d: d.interlock_open(), boards=up)
        opened = []
        for board_id, result in results.items():
            if isinstance(result, asyncio.CancelledError | AbortedError):
                continue  # an emergency stop took the board's queue meanwhile: read again next time
            level = f"unreadable: {result}" if isinstance(result, BaseException) else OPEN if result else CLOSED
            before = boards[board_id].interlock
            boards[board_id].interlock = level
            if _demands_stop(level) and not _demands_stop(before):
                opened.append(board_id)
                self.state.emit("interlock_open", board=board_id, level=level)
            elif level == CLOSED and _demands_stop(before):
                self.state.emit("interlock_closed", board=board_id)
        if opened:
            self.state.log.error("interlock open: emergency stop", boards=opened)
            await self.estop(reason=f"interlock open on board(s) {', '.join(opened)}")
        return self.levels()

    def levels(self) -> dict[str, str]:
        """Each configured interlock's last reading: closed, open, unreadable: why, or why unread."""
        return {b: self.state.boards[b].interlock or "not read yet" for b in self.boards}

    async def refuse_arm_if_open(self, client: str | None) -> None:
        """Read every interlock now; refuse ``arm`` unless all are closed."""
        levels = await self.poll()
        detail = {b: level for b, level in levels.items() if level != CLOSED}
        if detail:
            self.state.emit("refused", client=client, op="arm", reason="interlock open", interlocks=detail)
            text = ", ".join(f"{b} ({level})" for b, level in detail.items())
            raise InterlockOpenRefused(
                f"cannot arm: interlock of board(s) {text}; close it, then arm again", interlocks=detail
            )


def _demands_stop(level: str | None) -> bool:
    """An open contact, or one that cannot be read (fail-safe)."""
    return level is not None and (level == OPEN or level.startswith("unreadable"))
