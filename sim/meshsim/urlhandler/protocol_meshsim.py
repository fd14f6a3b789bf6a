"""pyserial URL handler for ``meshsim://RACK/BOARD?config=...``: a simulated board, in-process.

pyserial finds this module through ``serial.protocol_handler_packages`` (the package
``meshsim.urlhandler``), so a driver that opens every board with ``serial_for_url(url)`` cannot
tell the simulator from a real port. Reads honour the port's timeout; a reply becomes readable
only when the simulated board has produced it (a monitor read takes its integration time).
"""

from __future__ import annotations

import threading
import time
from typing import Any

import serial
from serial.serialutil import PortNotOpenError, SerialBase, SerialException, Timeout

from meshsim import inprocess


class Serial(SerialBase):  # type: ignore[misc]
    """A pyserial port connected to one board of an in-process simulated rack."""

    is_open: bool

    def open(self) -> None:
        if self._port is None:
            raise SerialException("port must be set before open")
        if self.is_open:
            raise SerialException("port already open")
        try:
            self._rack, self._board = inprocess.attach(self.portstr)
        except (inprocess.InProcessError, OSError, ValueError) as exc:
            raise SerialException(f"could not open {self.portstr}: {exc}") from exc
        self._cond = threading.Condition()
        self._pending: list[tuple[float, bytes]] = []  # (wall time ready, bytes), in order
        self._buffer = bytearray()
        self.is_open = True

    def _reconfigure_port(self) -> None:
        """Baud rate and the like mean nothing to an in-process board."""

    def close(self) -> None:
        if self.is_open:
            self.is_open = False
            inprocess.detach(self.portstr)
            with self._cond:
                self._cond.notify_all()

    def from_url(self, url: str) -> str:
        inprocess.parse_url(url)
        return url

    def _collect(self) -> None:
        now = time.monotonic()
        while self._pending and self._pending[0][0] <= now:
            self._buffer += self._pending.pop(0)[1]

    @property
    def in_waiting(self) -> int:
        if not self.is_open:
            raise PortNotOpenError()
        with self._cond:
            self._collect()
            return len(self._buffer)

    def read(self, size: int = 1) -> bytes:
        if not self.is_open:
            raise PortNotOpenError()
        deadline = Timeout(self._timeout)
        with self._cond:
            while True:
                self._collect()
                if len(self._buffer) >= size or deadline.expired() or not self.is_open:
                    break
                wait = deadline.time_left() if self._timeout is not None else None
                if self._pending:
                    until_ready = max(self._pending[0][0] - time.monotonic(), 0.0)
                    wait = until_ready if wait is None else min(wait, until_ready)
                self._cond.wait(wait)
            out = bytes(self._buffer[:size])
            del self._buffer[:size]
            return out

    def write(self, data: Any) -> int:
        if not self.is_open:
            raise PortNotOpenError()
        payload = bytes(data)
        clock = self._rack.clock
        replies = self._rack.exchange(self._board, payload)
        sim_now = clock.now()
        wall_now = time.monotonic()
        with self._cond:
            for ready, reply in replies:
                self._pending.append((wall_now + clock.wall_seconds(max(ready - sim_now, 0.0)), reply))
            self._pending.sort(key=lambda item: item[0])
            self._cond.notify_all()
        return len(payload)

    def reset_input_buffer(self) -> None:
        if not self.is_open:
            raise PortNotOpenError()
        with self._cond:
            self._buffer.clear()
            self._pending.clear()

    def reset_output_buffer(self) -> None:
        """Writes are delivered at once; nothing waits to be sent."""

    @property
    def out_waiting(self) -> int:
        return 0

    def cancel_read(self) -> None:
        with self._cond:
            self._cond.notify_all()


def register() -> None:
    """Make ``meshsim://`` URLs known to pyserial in this process."""
    if "meshsim.urlhandler" not in serial.protocol_handler_packages:
        serial.protocol_handler_packages.append("meshsim.urlhandler")


register()
