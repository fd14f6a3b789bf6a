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

import time

from meshwarden.config.model import BoardConfig
from meshwarden.drivers.port_link import PortLinkDriver
from meshwarden.errors import ProtocolError
from meshwarden.protocol import Frame, FrameDecoder, decode_reply, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason


class ReferenceDriver(PortLinkDriver):
    """A board speaking the reference protocol."""

    def __init__(self, config: BoardConfig) -> None:
        super().__init__(config)
        self.decoder = FrameDecoder()
        self.seq = 0

    def _link_opened(self) -> None:
        self.decoder.reset()

    def _next_seq(self) -> int:
        self.seq = self.seq % 255 + 1
        return self.seq

    def _exchange(self, request: m.Message) -> m.Message:
        seq = self._next_seq()
        wire = encode_frame(Frame(self.config.address, seq, request.CODE, request.pack()))
        emergency = request.CODE == m.Command.ZERO_ALL
        return self._with_retries(lambda: self._attempt(wire, seq, request), type(request).__name__, emergency)

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
            self._check_abort(request.CODE == m.Command.ZERO_ALL)
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
