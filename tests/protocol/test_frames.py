"""Frames and the stream decoder: round trips, corruption, garbage and resynchronisation."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from meshwarden.errors import ChecksumError, FramingError, ProtocolError
from meshwarden.protocol import Frame, FrameDecoder, cobs, decode_frame, decode_reply, decode_request, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.frame import MAX_ENCODED, MAX_PAYLOAD

frames = st.builds(
    Frame,
    address=st.integers(0, 255),
    seq=st.integers(0, 255),
    command=st.integers(0, 255),
    payload=st.binary(max_size=MAX_PAYLOAD),
)


@given(frames)
def test_frame_round_trip(frame: Frame) -> None:
    """Any valid frame survives encode/decode unchanged."""
    wire = encode_frame(frame)
    assert wire.endswith(b"\x00") and 0 not in wire[:-1]
    assert decode_frame(wire[:-1]) == frame


@given(frames, st.data())
def test_any_single_bit_flip_is_detected(frame: Frame, data: st.DataObject) -> None:
    """CRC-16 detects every single-bit error in the framed bytes (common practice: any CRC whose
    polynomial has more than one term does)."""
    body = cobs.decode(encode_frame(frame)[:-1])
    position = data.draw(st.integers(0, len(body) * 8 - 1))
    flipped = bytearray(body)
    flipped[position // 8] ^= 1 << (position % 8)
    with pytest.raises(ChecksumError):
        decode_frame(cobs.encode(bytes(flipped)))


def test_decoder_resynchronises_after_garbage() -> None:
    """Garbage, a corrupted frame and a truncated frame do not stop the next good frame."""
    good = Frame(1, 7, 0x01)
    corrupted = bytearray(encode_frame(Frame(1, 8, 0x08)))
    corrupted[2] ^= 0x40
    stream = b"\x13\x37garbage\x00" + bytes(corrupted) + encode_frame(good)[:3] + b"\x00" + encode_frame(good)
    results = list(FrameDecoder().feed(stream))
    assert results[-1] == good
    assert all(isinstance(r, ProtocolError) for r in results[:-1])
    assert any(isinstance(r, ChecksumError) for r in results)


def test_decoder_handles_byte_by_byte_arrival() -> None:
    """A frame split over many reads is assembled once complete."""
    decoder = FrameDecoder()
    wire = encode_frame(Frame(2, 9, 0x05, m.ReadMonitors(0, 32, 500).pack()))
    out = [r for b in wire for r in decoder.feed(bytes([b]))]
    assert out == [Frame(2, 9, 0x05, m.ReadMonitors(0, 32, 500).pack())]
    assert decoder.pending == 0


def test_decoder_bounds_its_buffer() -> None:
    """Endless bytes without a delimiter are dropped with one framing error, then decoding resumes."""
    decoder = FrameDecoder()
    out = list(decoder.feed(b"\x01" * (MAX_ENCODED * 3)))
    assert len(out) == 1 and isinstance(out[0], FramingError)
    assert decoder.pending == 0
    assert list(decoder.feed(b"\x00" + encode_frame(Frame(1, 1, 1)))) == [Frame(1, 1, 1)]


def test_oversized_payload_is_refused() -> None:
    """A payload over the protocol's maximum cannot be framed."""
    with pytest.raises(ProtocolError, match="exceeds"):
        Frame(1, 1, 2, bytes(MAX_PAYLOAD + 1))


@pytest.mark.parametrize(
    ("command", "payload"),
    [(0x02, b"\x00\x00\x05\x00\x01\x00"), (0x05, b"\x00"), (0x07, b"\x10\x27\x00\x00"), (0x01, b"\x00")],
)
def test_wrong_payload_lengths_are_protocol_errors(command: int, payload: bytes) -> None:
    """A payload whose length does not match its command is an error naming the message."""
    with pytest.raises(ProtocolError, match="bytes"):
        decode_request(command, payload)


def test_unknown_commands_are_protocol_errors() -> None:
    """Unknown request commands and non-reply command bytes are protocol errors."""
    with pytest.raises(ProtocolError, match="unknown command 0x42"):
        decode_request(0x42, b"")
    with pytest.raises(ProtocolError, match="not a reply"):
        decode_reply(0x02, b"")


def test_nak_describes_itself() -> None:
    """A NAK reads as a sentence naming the command and the reason."""
    assert m.Nak(0x02, 5, 64).describe() == "board refused write_outputs: bad_channel (detail 64)"
