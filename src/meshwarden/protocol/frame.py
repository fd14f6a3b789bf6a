"""Frames of the board protocol: address, sequence number, command, payload, CRC; COBS on the wire.

Decoded layout (docs/protocol.md)::

    +---------+-----+---------+-------------------+-----------------+
    | address | seq | command | payload (0..1024) | CRC-16 (big end)|
    +---------+-----+---------+-------------------+-----------------+

The CRC (CRC-16/IBM-3740) covers address through payload. The whole is COBS-encoded and followed
by one zero byte. :class:`FrameDecoder` turns a byte stream into frames and typed errors,
resynchronising at every zero, and never raises on bad input: a corrupted frame is reported and
the next good one still comes through.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

from meshwarden.errors import ChecksumError, FramingError, ProtocolError
from meshwarden.protocol import cobs
from meshwarden.protocol.crc import crc16

DELIMITER = b"\x00"
MAX_PAYLOAD = 1024
HEADER = 3
TRAILER = 2
MIN_FRAME = HEADER + TRAILER
MAX_FRAME = HEADER + MAX_PAYLOAD + TRAILER
# COBS adds one byte per 254 plus one: the longest encoded frame a decoder must accept.
MAX_ENCODED = MAX_FRAME + MAX_FRAME // 254 + 1


@dataclass(frozen=True)
class Frame:
    """One decoded frame."""

    address: int
    seq: int
    command: int
    payload: bytes = b""

    def __post_init__(self) -> None:
        for name in ("address", "seq", "command"):
            value = getattr(self, name)
            if not 0 <= value <= 255:
                raise ProtocolError(f"{name} must be a byte (0..255), got {value}")
        if len(self.payload) > MAX_PAYLOAD:
            raise ProtocolError(f"payload of {len(self.payload)} bytes exceeds the {MAX_PAYLOAD}-byte maximum")


def encode_frame(frame: Frame) -> bytes:
    """The bytes to send for ``frame``: COBS(body + CRC) followed by the zero delimiter."""
    body = bytes((frame.address, frame.seq, frame.command)) + frame.payload
    crc = crc16(body)
    return cobs.encode(body + crc.to_bytes(2, "big")) + DELIMITER


def decode_frame(block: bytes) -> Frame:
    """Decode one COBS block (delimiter removed); raise FramingError or ChecksumError."""
    if len(block) > MAX_ENCODED:
        raise FramingError(f"frame of {len(block)} encoded bytes exceeds the {MAX_ENCODED}-byte maximum")
    raw = cobs.decode(block)
    if len(raw) < MIN_FRAME:
        raise FramingError(f"frame of {len(raw)} bytes is shorter than the {MIN_FRAME}-byte minimum")
    body, received = raw[:-TRAILER], int.from_bytes(raw[-TRAILER:], "big")
    expected = crc16(body)
    if received != expected:
        raise ChecksumError(f"CRC mismatch: frame says 0x{received:04x}, contents give 0x{expected:04x}")
    return Frame(body[0], body[1], body[2], bytes(body[HEADER:]))


class FrameDecoder:
    """Incremental stream decoder: feed bytes, get frames and errors in arrival order.

    Bytes before the first delimiter a decoder ever sees may be the tail of a frame it joined in
    the middle of; they are still tried and, if broken, reported as one framing error. A block
    that grows past the longest valid frame is dropped at once (reported once) and the decoder
    skips to the next delimiter, so garbage without zeros cannot make it buffer without bound.
    """

    def __init__(self) -> None:
        self._buffer = bytearray()
        self._overflowed = False

    def feed(self, data: bytes) -> Iterator[Frame | ProtocolError]:
        """Yield each complete frame (or the error that broke it) found after adding ``data``."""
        for byte_chunk in _split_keep(data):
            if byte_chunk == DELIMITER:
                if self._overflowed:
                    self._overflowed = False
                elif self._buffer:
                    block = bytes(self._buffer)
                    self._buffer.clear()
                    try:
                        yield decode_frame(block)
                    except ProtocolError as exc:
                        yield exc
                continue
            if self._overflowed:
                continue
            self._buffer += byte_chunk
            if len(self._buffer) > MAX_ENCODED:
                self._buffer.clear()
                self._overflowed = True
                yield FramingError(f"more than {MAX_ENCODED} bytes without a delimiter; skipping to the next one")

    @property
    def pending(self) -> int:
        """Bytes held waiting for a delimiter."""
        return len(self._buffer)

    def reset(self) -> None:
        """Forget any partial frame (after a reconnect)."""
        self._buffer.clear()
        self._overflowed = False


def _split_keep(data: bytes) -> Iterator[bytes]:
    """Split on zero bytes, yielding the pieces and each delimiter on its own."""
    start = 0
    while True:
        index = data.find(0, start)
        if index < 0:
            if start < len(data):
                yield data[start:]
            return
        if index > start:
            yield data[start:index]
        yield DELIMITER
        start = index + 1
