"""A board reached through a pyserial port: open, close, reopen with backoff, and the retry loop.

Both shipped drivers share this: the link is opened with :func:`meshwarden.transport.open_port`
(any pyserial URL), a lost link is closed and reopened no more often than an exponential backoff
allows, and one request is tried up to ``retries + 1`` times, each attempt reported to the
error-rate count, giving up at once when an emergency stop sets ``abort`` (unless the request is
the emergency stop's own zero).
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable
from typing import TypeVar

import serial

from meshwarden.config.model import BoardConfig
from meshwarden.drivers.base import BoardDriver
from meshwarden.errors import LinkError, LinkTimeout
from meshwarden.transport import open_port

READ_SLICE_S = 0.02
BACKOFF_START_S = 0.05
BACKOFF_MAX_S = 2.0

T = TypeVar("T")


class PortLinkDriver(BoardDriver):
    """The link half of a driver over a pyserial port; subclasses implement ``_exchange``."""

    def __init__(self, config: BoardConfig) -> None:
        super().__init__(config)
        self.port: serial.SerialBase | None = None
        self._backoff = BACKOFF_START_S
        self._next_open = 0.0
        self.attempts_failed = 0  # every failed attempt since the driver was made (never windowed)

    def _open_link(self) -> None:
        self._close_link()  # never two handles on one port (an exclusive lock would refuse the second)
        try:
            self.port = open_port(self.config.url, READ_SLICE_S, baud_rate=self.config.baud_rate)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise LinkError(
                f"board {self.config.id}: cannot open {self.config.url}: {exc}", board=self.config.id
            ) from exc
        self.port.reset_input_buffer()
        self._backoff = BACKOFF_START_S
        self._link_opened()

    def _link_opened(self) -> None:
        """Called after every (re)open: reset what depends on the byte stream."""

    def _close_link(self) -> None:
        if self.port is not None:
            with contextlib.suppress(serial.SerialException, OSError):
                self.port.close()
            self.port = None

    def _reconnect(self) -> bool:
        """Try to reopen a lost link, no more often than the backoff allows."""
        now = time.monotonic()
        if now < self._next_open:
            return False
        try:
            self._open_link()
            self.log.warning("link reopened")
            return True
        except LinkError:
            self._next_open = now + self._backoff
            self._backoff = min(self._backoff * 2, BACKOFF_MAX_S)
            return False

    def _failed(self) -> None:
        """One failed attempt: counted here and in the error rate."""
        self.attempts_failed += 1
        self.note_attempt(False)

    def _check_abort(self, emergency: bool) -> None:
        if self.abort.is_set() and not emergency:
            raise LinkError(f"board {self.config.id}: aborted by emergency stop", board=self.config.id)

    def _with_retries(self, attempt: Callable[[], T | str], what: str, emergency: bool) -> T:
        """``attempt()`` (a reply, or a short reason to retry) until it gives a reply, over a link
        reopened when lost; a LinkTimeout naming ``what`` when the retries are spent."""
        last_error = "no reply"
        for number in range(self.config.retries + 1):
            self._check_abort(emergency)
            if self.port is None and not self._reconnect():
                self._failed()
                last_error = "link down"
                time.sleep(min(self.config.timeout_s, max(self._next_open - time.monotonic(), 0.0)))
                continue
            try:
                reply = attempt()
            except (serial.SerialException, OSError) as exc:
                self.log.warning("link lost", error=str(exc))
                self._close_link()
                self._failed()
                last_error = f"link lost: {exc}"
                continue
            if isinstance(reply, str):
                self._failed()
                last_error = reply
                if number < self.config.retries:
                    self.log.debug("retry", request=what, reason=reply)
                continue
            self.note_attempt(True)
            return reply
        raise LinkTimeout(
            f"board {self.config.id}: {what} failed after {self.config.retries + 1} attempts ({last_error})",
            board=self.config.id,
        )
