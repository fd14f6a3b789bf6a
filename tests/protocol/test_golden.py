"""The golden byte examples of docs/protocol.md decode to what the document says, and back."""

from __future__ import annotations

import pytest

from meshwarden.protocol import Frame, decode_frame, decode_reply, decode_request, encode_frame
from meshwarden.protocol.messages import NAK_COMMAND, REPLY_BIT
from tests.protocol.golden import MEANING, golden_rows


def test_every_documented_example_has_a_meaning() -> None:
    """The document and the tests list the same examples."""
    assert set(golden_rows()) == set(MEANING)


@pytest.mark.parametrize("name", sorted(MEANING))
def test_golden_example_decodes(name: str) -> None:
    """Each golden wire example decodes to the documented frame and message."""
    wire = golden_rows()[name]
    address, seq, command, message = MEANING[name]
    assert wire[-1] == 0 and 0 not in wire[:-1]
    frame = decode_frame(wire[:-1])
    assert (frame.address, frame.seq, frame.command) == (address, seq, command)
    is_reply = command == NAK_COMMAND or command & REPLY_BIT
    decoded = decode_reply(command, frame.payload) if is_reply else decode_request(command, frame.payload)
    assert decoded == message


@pytest.mark.parametrize("name", sorted(MEANING))
def test_golden_example_encodes(name: str) -> None:
    """Encoding the documented message gives exactly the golden bytes."""
    address, seq, command, message = MEANING[name]
    assert encode_frame(Frame(address, seq, command, message.pack())) == golden_rows()[name]
