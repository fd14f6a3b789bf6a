"""The board wire protocol: CRC-16, COBS framing, frames and typed messages. Pure, no I/O.

This package is the one piece of meshwarden that the simulator imports: both sides of the
cable speak through the same codec, and docs/protocol.md's golden examples pin it down.
"""

from meshwarden.protocol.frame import Frame, FrameDecoder, decode_frame, encode_frame
from meshwarden.protocol.messages import (
    Command,
    Message,
    Nak,
    NakReason,
    StatusFlag,
    WatchdogAction,
    decode_reply,
    decode_request,
    reply_command,
)

__all__ = [
    "Command",
    "Frame",
    "FrameDecoder",
    "Message",
    "Nak",
    "NakReason",
    "StatusFlag",
    "WatchdogAction",
    "decode_frame",
    "decode_reply",
    "decode_request",
    "encode_frame",
    "reply_command",
]
