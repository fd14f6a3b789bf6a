"""CRC-16/IBM-3740 (also catalogued as CRC-16/CCITT-FALSE), the frame checksum of the board protocol.

Catalogue parameters: width=16 poly=0x1021 init=0xffff refin=false refout=false xorout=0x0000
check=0x29b1 residue=0x0000 (Greg Cook, "Catalogue of parametrised CRC algorithms"). Table
driven, one byte at a time: the frames are short and the table keeps it fast enough for a
full-rack write in pure Python.
"""

from __future__ import annotations

POLY = 0x1021
INIT = 0xFFFF
CHECK = 0x29B1  # the catalogue's check value: CRC of b"123456789"


def _table() -> tuple[int, ...]:
    table = []
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ POLY) if crc & 0x8000 else (crc << 1)
        table.append(crc & 0xFFFF)
    return tuple(table)


_TABLE = _table()


def crc16(data: bytes | bytearray | memoryview, crc: int = INIT) -> int:
    """The CRC of ``data``; pass a previous result as ``crc`` to continue over more bytes."""
    table = _TABLE
    for byte in bytes(data):
        crc = ((crc << 8) & 0xFFFF) ^ table[(crc >> 8) ^ byte]
    return crc
