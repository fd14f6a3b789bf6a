"""Consistent Overhead Byte Stuffing (Cheshire & Baker, IEEE/ACM Trans. Networking 7:159, 1999).

COBS removes every zero byte from a frame at a cost of at most one byte in 254, so a single zero
can mark the end of every frame on the wire. A receiver that loses bytes or starts listening in
the middle of a frame resynchronises at the next zero: exactly what a serial link to a board
that may be reset, unplugged or flooded with noise needs.
"""

from __future__ import annotations

from meshwarden.errors import FramingError


def encode(data: bytes | bytearray) -> bytes:
    """COBS-encode ``data`` (without the trailing zero delimiter)."""
    out = bytearray()
    block = bytearray()
    raw = bytes(data)
    for index, byte in enumerate(raw):
        if byte == 0:
            out.append(len(block) + 1)
            out += block
            block.clear()
        else:
            block.append(byte)
            if len(block) == 254:
                out.append(255)
                out += block
                block.clear()
                if index == len(raw) - 1:
                    # A full block at the very end needs no closing code (the published encoding).
                    return bytes(out)
    out.append(len(block) + 1)
    out += block
    return bytes(out)


def decode(data: bytes | bytearray) -> bytes:
    """Decode one COBS block (without its delimiter); a zero inside or a short block is an error."""
    out = bytearray()
    i = 0
    n = len(data)
    while i < n:
        code = data[i]
        if code == 0:
            raise FramingError(f"zero byte inside a COBS block at offset {i}")
        end = i + code
        if end > n:
            raise FramingError(f"COBS block truncated: code {code} at offset {i} runs past the end ({n} bytes)")
        chunk = bytes(data[i + 1 : end])
        if 0 in chunk:
            raise FramingError(f"zero byte inside a COBS block at offset {i + 1 + chunk.index(0)}")
        out += chunk
        i = end
        if code < 255 and i < n:
            out.append(0)
    return bytes(out)
