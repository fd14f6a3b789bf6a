"""CRC-16 and COBS against their published check values and examples."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from meshwarden.errors import FramingError
from meshwarden.protocol import cobs
from meshwarden.protocol.crc import crc16


def test_crc_catalogue_check_value() -> None:
    """CRC-16/IBM-3740 (CRC-16/CCITT-FALSE) of "123456789" is 0x29B1.
    Source: Greg Cook's CRC catalogue ("reveng"), entry CRC-16/IBM-3740."""
    assert crc16(b"123456789") == 0x29B1


def bitwise_crc(data: bytes) -> int:
    """The catalogue's parameters applied bit by bit, independent of the library implementation."""
    crc = 0xFFFF
    for byte in data:
        crc ^= byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) & 0xFFFF if crc & 0x8000 else (crc << 1) & 0xFFFF
    return crc


@given(st.binary(max_size=300))
def test_crc_matches_bitwise_definition(data: bytes) -> None:
    """The CRC equals the bit-serial definition of the catalogue's parameters for any input."""
    assert crc16(data) == bitwise_crc(data)


@given(st.binary(max_size=100), st.binary(max_size=100))
def test_crc_continues_over_more_bytes(head: bytes, tail: bytes) -> None:
    """Passing the CRC of the first part as the start value gives the CRC of the whole."""
    assert crc16(tail, crc16(head)) == bitwise_crc(head + tail)


def test_crc_residue_of_a_message_with_its_crc_is_zero() -> None:
    """Appending the big-endian CRC gives residue 0x0000 (catalogue parameter 'residue')."""
    data = b"meshwarden"
    assert crc16(data + crc16(data).to_bytes(2, "big")) == 0x0000


RUN_01_FE = bytes(range(1, 255))  # 01 02 ... FE, 254 bytes

# Source: the worked examples of the COBS encoding as tabulated in the Wikipedia article
# "Consistent Overhead Byte Stuffing" (which follows Cheshire & Baker 1999), without the final
# zero delimiter; transcribed from memory of that table.
COBS_EXAMPLES = [
    (b"\x00", b"\x01\x01"),
    (b"\x00\x00", b"\x01\x01\x01"),
    (b"\x00\x11\x00", b"\x01\x02\x11\x01"),
    (b"\x11\x22\x00\x33", b"\x03\x11\x22\x02\x33"),
    (b"\x11\x22\x33\x44", b"\x05\x11\x22\x33\x44"),
    (b"\x11\x00\x00\x00", b"\x02\x11\x01\x01\x01"),
    (RUN_01_FE, b"\xff" + RUN_01_FE),
    (b"\x00" + RUN_01_FE, b"\x01\xff" + RUN_01_FE),
    (RUN_01_FE + b"\xff", b"\xff" + RUN_01_FE + b"\x02\xff"),
    (bytes(range(2, 256)) + b"\x00", b"\xff" + bytes(range(2, 256)) + b"\x01\x01"),
    (bytes(range(3, 256)) + b"\x00\x01", b"\xfe" + bytes(range(3, 256)) + b"\x02\x01"),
]


@pytest.mark.parametrize(("raw", "encoded"), COBS_EXAMPLES)
def test_cobs_published_examples(raw: bytes, encoded: bytes) -> None:
    """Encoding gives the published bytes and decoding gives the original back."""
    assert cobs.encode(raw) == encoded
    assert cobs.decode(encoded) == raw


@given(st.binary(max_size=1200))
def test_cobs_round_trip_and_no_zero(data: bytes) -> None:
    """Any data survives encode/decode and the encoding contains no zero byte."""
    encoded = cobs.encode(data)
    assert 0 not in encoded
    assert cobs.decode(encoded) == data
    assert len(encoded) <= len(data) + len(data) // 254 + 1


@pytest.mark.parametrize("bad", [b"\x05\x11\x22", b"\x03\x11\x00\x22", b"\x00"])
def test_cobs_rejects_broken_blocks(bad: bytes) -> None:
    """Truncated blocks and stray zeros are framing errors, not silent garbage."""
    with pytest.raises(FramingError):
        cobs.decode(bad)
