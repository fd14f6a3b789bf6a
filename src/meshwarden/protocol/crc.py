"""CRC-16/IBM-3740 (also catalogued as CRC-16/CCITT-FALSE), the frame checksum of the board protocol.

Catalogue parameters: width=16 poly=0x1021 init=0xffff refin=false refout=false xorout=0x0000
check=0x29b1 residue=0x0000 (Greg Cook, "Catalogue of parametrised CRC algorithms").

The standard library's :func:`binascii.crc_hqx` is this same non-reflected CRC with poly 0x1021
and no final xor, started from the value it is given; started from 0xFFFF it is CRC-16/IBM-3740,
computed in C. Every frame in both directions is checked, so the pure-Python table loop it
replaces was a measurable share of a simulated write.
"""

from __future__ import annotations

from binascii import crc_hqx

POLY = 0x1021
INIT = 0xFFFF
CHECK = 0x29B1  # the catalogue's check value: CRC of b"123456789"


def crc16(data: bytes | bytearray | memoryview, crc: int = INIT) -> int:
    """The CRC of ``data``; pass a previous result as ``crc`` to continue over more bytes."""
    return crc_hqx(data, crc)
