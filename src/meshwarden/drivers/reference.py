"""The reference driver: our wire protocol (docs/protocol.md) over any pyserial URL.

Reactions to each class of link error (the classes a safety-rated fieldbus defends against):

=====================  ==============================================================
corrupted reply        CRC or framing error -> retransmit with the same sequence number
lost request or reply  timeout -> retransmit with the same sequence number
board saw corruption   checksum/framing NAK (seq 0) -> retransmit at once
repeated reply         a reply whose seq is not the outstanding one -> dropped
stale (late) reply     same: only the outstanding seq is accepted
wrong board address    dropped
inserted garbage       the stream decoder resynchronises at the next delimiter
link lost              close, reopen with exponential backoff within the retry budget
=====================  ==============================================================

Because the board answers a repeated sequence number from its stored reply without executing
again, a retransmitted write is applied exactly once. Sequence numbers run 1..255 (0 is what a
board uses when it cannot read the frame's own).
"""

from __future__ import annotations

import contextlib
import time

import serial

from meshwarden.config.model import BoardConfig
from meshwarden.drivers.base import BoardDriver
from meshwarden.errors import LinkError, LinkTimeout, ProtocolError
from meshwarden.protocol import Frame, FrameDecoder, decode_reply, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason
from meshwarden.transport import open_port

READ_SLICE_S = 0.02
BACKOFF_START_S = 0.05
BACKOFF_MAX_S = 2.0


class ReferenceDriver(BoardDriver):
    """A board speaking the reference protocol."""

    def __init__(self, config: BoardConfig) -> None:
        super().__init__(config)
        self.port: serial.SerialBase | None = None
        self.decoder = FrameDecoder()
        self.seq = 0
        self._backoff = BACKOFF_START_S
        self._next_open = 0.0

    def _open_link(self) -> None:
        self._close_link()  # never two handles on one port (an exclusive lock would refuse the second)
        try:
            self.port = open_port(self.config.url, READ_SLICE_S, baud_rate=self.config.baud_rate)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise LinkError(
                f"board {self.config.id}: cannot open {self.config.url}: {exc}", board=self.config.id
            ) from exc
        self.port.reset_input_buffer()
        self.decoder.reset()
        self._backoff = BACKOFF_START_S

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

    def _next_seq(self) -> int:
        self.seq = self.seq % 255 + 1
        return self.seq

    def _exchange(self, request: m.Message) -> m.Message:
        seq = self._next_seq()
        wire = encode_frame(Frame(self.config.address, seq, request.CODE, request.pack()))
        last_error = "no reply"
        for attempt in range(self.config.retries + 1):
            if self.abort.is_set() and request.CODE != m.Command.ZERO_ALL:
                raise LinkError(f"board {self.config.id}: aborted by emergency stop", board=self.config.id)
            if self.port is None and not self._reconnect():
                self.note_attempt(False)
                last_error = "link down"
                time.sleep(min(self.config.timeout_s, max(self._next_open - time.monotonic(), 0.0)))
                continue
            try:
                reply = self._attempt(wire, seq, request)
            except (serial.SerialException, OSError) as exc:
                self.log.warning("link lost", error=str(exc))
                self._close_link()
                self.note_attempt(False)
                last_error = f"link lost: {exc}"
                continue
            if isinstance(reply, str):
                self.note_attempt(False)
                last_error = reply
                if attempt < self.config.retries:
                    self.log.debug("retry", command=type(request).__name__, seq=seq, reason=reply)
                continue
            self.note_attempt(True)
            return reply
        raise LinkTimeout(
            f"board {self.config.id}: {type(request).__name__} failed after "
            f"{self.config.retries + 1} attempts ({last_error})",
            board=self.config.id,
        )

    def _attempt(self, wire: bytes, seq: int, request: m.Message) -> m.Message | str:
        """One send and wait: the reply, or a short reason to retry."""
        assert self.port is not None
        self.port.write(wire)
        deadline = time.monotonic() + self.config.timeout_s
        while time.monotonic() < deadline:
            chunk = self.port.read(max(1, self.port.in_waiting))
            retry_reason = None
            for item in list(self.decoder.feed(chunk)):
                verdict = self._judge(item, seq, request)
                if isinstance(verdict, m.Message):
                    return verdict
                retry_reason = retry_reason or verdict
            if retry_reason is not None:
                return retry_reason
            if self.abort.is_set() and request.CODE != m.Command.ZERO_ALL:
                raise LinkError(f"board {self.config.id}: aborted by emergency stop", board=self.config.id)
        return "timeout"

    def _judge(self, item: Frame | ProtocolError, seq: int, request: m.Message) -> m.Message | str | None:
        """The reply in ``item``, a reason to retransmit, or None to ignore it."""
        if isinstance(item, ProtocolError):
            return f"corrupted reply ({item.code})"
        if item.address != self.config.address:
            return None  # a reply claiming another board: not ours
        if item.command == m.NAK_COMMAND and item.seq == 0:
            try:
                nak = decode_reply(item.command, item.payload)
            except ProtocolError:
                return "corrupted NAK"
            if isinstance(nak, m.Nak) and nak.reason in (NakReason.CHECKSUM, NakReason.FRAMING):
                return "board saw a corrupted frame"
            return None
        if item.seq != seq or item.command not in (m.reply_command(request.CODE), m.NAK_COMMAND):
            return None  # a repeated or stale reply
        try:
            return decode_reply(item.command, item.payload)
        except ProtocolError as exc:
            return f"undecodable reply ({exc.message})"


__all__ = ["ReferenceDriver"]
