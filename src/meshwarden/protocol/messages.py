"""The commands of the board protocol and their payloads (little-endian), as typed messages.

A request's command byte is its ``CODE``; the acknowledgement of it carries ``CODE | 0x80`` and
the reply payload below; a negative acknowledgement carries :data:`NAK_COMMAND` and a
:class:`Nak` payload saying which command failed and why. The byte layouts are specified with
golden examples in docs/protocol.md; this module is the single implementation of them, used by
the daemon's driver and by the simulator's firmware alike. Pure: no I/O, no clock.
"""

from __future__ import annotations

import enum
import struct
from dataclasses import dataclass
from typing import Any, ClassVar

from meshwarden.errors import ProtocolError

REPLY_BIT = 0x80
NAK_COMMAND = 0x7F


class Command(enum.IntEnum):
    IDENTIFY = 0x01
    WRITE_OUTPUTS = 0x02
    READ_OUTPUTS = 0x03
    READ_SENSE = 0x04
    READ_MONITORS = 0x05
    SET_MONITOR_GAIN = 0x06
    CONFIGURE_WATCHDOG = 0x07
    HEARTBEAT = 0x08
    ZERO_ALL = 0x09
    STATUS = 0x0A
    RESET = 0x0B
    CLEAR_FAULTS = 0x0C


class NakReason(enum.IntEnum):
    CHECKSUM = 1
    FRAMING = 2
    UNKNOWN_COMMAND = 3
    BAD_LENGTH = 4
    BAD_CHANNEL = 5
    BAD_VALUE = 6
    BUSY = 7
    WATCHDOG_TRIPPED = 8
    OUTPUT_FAULT = 9
    POWERED_ON = 10


class WatchdogAction(enum.IntEnum):
    OFF = 0
    HOLD = 1
    RAMP_TO_ZERO = 2


class StatusFlag(enum.IntFlag):
    WATCHDOG_TRIPPED = 0x0001
    OUTPUT_FAULT = 0x0002
    POWER_ON = 0x0004  # set at boot, cleared by CLEAR_FAULTS: "this board was (re)started"
    RAMPING = 0x0008
    # The board's interlock input (a door switch, a latching stop button, a shutter contact) is
    # open. Only reported: the board does not act on it; the host stops the whole rack.
    INTERLOCK_OPEN = 0x0010


def _unpack(fmt: str, payload: bytes, what: str) -> tuple[Any, ...]:
    size = struct.calcsize(fmt)
    if len(payload) != size:
        raise ProtocolError(f"{what}: payload of {len(payload)} bytes, expected {size}")
    return struct.unpack(fmt, payload)


def _range_head(payload: bytes, what: str, item_size: int) -> tuple[int, int, bytes]:
    if len(payload) < 4:
        raise ProtocolError(f"{what}: payload of {len(payload)} bytes is shorter than its 4-byte header")
    first, count = struct.unpack_from("<HH", payload)
    rest = payload[4:]
    if len(rest) != count * item_size:
        raise ProtocolError(f"{what}: {count} items need {count * item_size} bytes, got {len(rest)}")
    return first, count, rest


class Message:
    """Base of every payload type: ``pack`` to bytes, ``unpack`` from bytes."""

    CODE: ClassVar[int]

    def pack(self) -> bytes:
        return b""

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        _unpack("<", payload, cls.__name__)
        return cls()


@dataclass(frozen=True)
class _Empty(Message):
    pass


@dataclass(frozen=True)
class _Range(Message):
    """A request naming a contiguous range of channels: first, count."""

    first: int
    count: int

    def pack(self) -> bytes:
        return struct.pack("<HH", self.first, self.count)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        return cls(*_unpack("<HH", payload, cls.__name__))


@dataclass(frozen=True)
class _Values(Message):
    """A contiguous range with one value per channel."""

    ITEM: ClassVar[str] = "H"
    first: int
    values: tuple[int, ...]

    def pack(self) -> bytes:
        return struct.pack(f"<HH{len(self.values)}{self.ITEM}", self.first, len(self.values), *self.values)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        first, count, rest = _range_head(payload, cls.__name__, struct.calcsize(cls.ITEM))
        return cls(first, struct.unpack(f"<{count}{cls.ITEM}", rest))


# ---- requests (host -> board) ----


@dataclass(frozen=True)
class Identify(_Empty):
    CODE = Command.IDENTIFY


@dataclass(frozen=True)
class WriteOutputs(_Values):
    """Latch DAC codes into outputs first .. first + len(values) - 1."""

    CODE = Command.WRITE_OUTPUTS


@dataclass(frozen=True)
class ReadOutputs(_Range):
    CODE = Command.READ_OUTPUTS


@dataclass(frozen=True)
class ReadSense(_Range):
    """Read what the high-voltage stage actually puts out, measured after the amplifier."""

    CODE = Command.READ_SENSE


@dataclass(frozen=True)
class ReadMonitors(Message):
    CODE = Command.READ_MONITORS
    first: int
    count: int
    integration_us: int

    def pack(self) -> bytes:
        return struct.pack("<HHI", self.first, self.count, self.integration_us)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        return cls(*_unpack("<HHI", payload, cls.__name__))


@dataclass(frozen=True)
class SetMonitorGain(_Values):
    """Select a transimpedance gain (an index into the board's gain list) per monitor input."""

    CODE = Command.SET_MONITOR_GAIN
    ITEM = "B"


@dataclass(frozen=True)
class ConfigureWatchdog(Message):
    CODE = Command.CONFIGURE_WATCHDOG
    timeout_ms: int
    action: int

    def pack(self) -> bytes:
        return struct.pack("<IB", self.timeout_ms, self.action)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        return cls(*_unpack("<IB", payload, cls.__name__))


@dataclass(frozen=True)
class Heartbeat(_Empty):
    CODE = Command.HEARTBEAT


@dataclass(frozen=True)
class ZeroAll(_Empty):
    CODE = Command.ZERO_ALL


@dataclass(frozen=True)
class Status(_Empty):
    CODE = Command.STATUS


@dataclass(frozen=True)
class Reset(_Empty):
    CODE = Command.RESET


@dataclass(frozen=True)
class ClearFaults(_Empty):
    CODE = Command.CLEAR_FAULTS


# ---- replies (board -> host) ----


@dataclass(frozen=True)
class IdentifyReply(Message):
    CODE = Command.IDENTIFY
    model: str
    firmware: tuple[int, int, int]
    outputs: int
    monitor_inputs: int
    dac_bits: int
    adc_bits: int
    full_scale_mv: int
    adc_full_scale_uv: int
    serial: int
    boot_count: int
    monitor_gains_ohms: tuple[int, ...]

    _HEAD: ClassVar[str] = "<16sBBBHHBBIIIIB"

    def pack(self) -> bytes:
        model = self.model.encode("ascii")[:16].ljust(16, b"\x00")
        head = struct.pack(
            self._HEAD,
            model,
            *self.firmware,
            self.outputs,
            self.monitor_inputs,
            self.dac_bits,
            self.adc_bits,
            self.full_scale_mv,
            self.adc_full_scale_uv,
            self.serial,
            self.boot_count,
            len(self.monitor_gains_ohms),
        )
        return head + struct.pack(f"<{len(self.monitor_gains_ohms)}I", *self.monitor_gains_ohms)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        size = struct.calcsize(cls._HEAD)
        if len(payload) < size:
            raise ProtocolError(f"IdentifyReply: payload of {len(payload)} bytes, expected at least {size}")
        (model, major, minor, patch, outputs, inputs, dac_bits, adc_bits, fs_mv, adc_uv, serial, boots, n_gains) = (
            struct.unpack_from(cls._HEAD, payload)
        )
        gains = _unpack(f"<{n_gains}I", payload[size:], "IdentifyReply gains")
        try:
            name = model.rstrip(b"\x00").decode("ascii")
        except UnicodeDecodeError:
            raise ProtocolError("IdentifyReply: model name is not ASCII") from None
        return cls(
            name, (major, minor, patch), outputs, inputs, dac_bits, adc_bits, fs_mv, adc_uv, serial, boots, tuple(gains)
        )


@dataclass(frozen=True)
class OutputsReply(_Values):
    """The codes latched in a range of outputs (the reply to both write and read)."""

    CODE = Command.READ_OUTPUTS


@dataclass(frozen=True)
class SenseReply(_Values):
    """Measured output voltages in microvolts (signed)."""

    CODE = Command.READ_SENSE
    ITEM = "i"


@dataclass(frozen=True)
class MonitorsReply(Message):
    CODE = Command.READ_MONITORS
    first: int
    integration_us: int
    counts: tuple[int, ...]

    def pack(self) -> bytes:
        n = len(self.counts)
        return struct.pack(f"<HHI{n}I", self.first, n, self.integration_us, *self.counts)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        if len(payload) < 8:
            raise ProtocolError(f"MonitorsReply: payload of {len(payload)} bytes is shorter than its 8-byte header")
        first, count, integration = struct.unpack_from("<HHI", payload)
        return cls(first, integration, _unpack(f"<{count}I", payload[8:], "MonitorsReply counts"))


@dataclass(frozen=True)
class GainReply(_Values):
    CODE = Command.SET_MONITOR_GAIN
    ITEM = "B"


@dataclass(frozen=True)
class WatchdogReply(ConfigureWatchdog):
    pass


@dataclass(frozen=True)
class HeartbeatReply(Message):
    CODE = Command.HEARTBEAT
    uptime_ms: int
    boot_count: int

    def pack(self) -> bytes:
        return struct.pack("<II", self.uptime_ms, self.boot_count)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        return cls(*_unpack("<II", payload, cls.__name__))


@dataclass(frozen=True)
class StatusReply(Message):
    CODE = Command.STATUS
    flags: int
    boot_count: int
    uptime_ms: int
    watchdog_remaining_ms: int
    crc_errors: int
    framing_errors: int

    def pack(self) -> bytes:
        return struct.pack(
            "<HIIIHH",
            self.flags,
            self.boot_count,
            self.uptime_ms,
            self.watchdog_remaining_ms,
            min(self.crc_errors, 0xFFFF),
            min(self.framing_errors, 0xFFFF),
        )

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        return cls(*_unpack("<HIIIHH", payload, cls.__name__))


@dataclass(frozen=True)
class Ack(_Empty):
    """An acknowledgement without data (zero all, reset, clear faults)."""

    CODE = 0


@dataclass(frozen=True)
class Nak(Message):
    CODE = NAK_COMMAND
    command: int
    reason: int
    detail: int = 0

    def pack(self) -> bytes:
        return struct.pack("<BBH", self.command, self.reason, self.detail)

    @classmethod
    def unpack(cls, payload: bytes) -> Message:
        return cls(*_unpack("<BBH", payload, cls.__name__))

    def describe(self) -> str:
        try:
            reason = NakReason(self.reason).name.lower()
        except ValueError:
            reason = f"reason {self.reason}"
        try:
            command = Command(self.command).name.lower()
        except ValueError:
            command = f"0x{self.command:02x}"
        return f"board refused {command}: {reason} (detail {self.detail})"


REQUESTS: dict[int, type[Message]] = {
    cls.CODE: cls
    for cls in (
        Identify,
        WriteOutputs,
        ReadOutputs,
        ReadSense,
        ReadMonitors,
        SetMonitorGain,
        ConfigureWatchdog,
        Heartbeat,
        ZeroAll,
        Status,
        Reset,
        ClearFaults,
    )
}

REPLIES: dict[int, type[Message]] = {
    Command.IDENTIFY: IdentifyReply,
    Command.WRITE_OUTPUTS: OutputsReply,
    Command.READ_OUTPUTS: OutputsReply,
    Command.READ_SENSE: SenseReply,
    Command.READ_MONITORS: MonitorsReply,
    Command.SET_MONITOR_GAIN: GainReply,
    Command.CONFIGURE_WATCHDOG: WatchdogReply,
    Command.HEARTBEAT: HeartbeatReply,
    Command.ZERO_ALL: Ack,
    Command.STATUS: StatusReply,
    Command.RESET: Ack,
    Command.CLEAR_FAULTS: Ack,
}


def decode_request(command: int, payload: bytes) -> Message:
    """The request message of a frame sent to a board."""
    cls = REQUESTS.get(command)
    if cls is None:
        raise ProtocolError(f"unknown command 0x{command:02x}")
    return cls.unpack(payload)


def decode_reply(command: int, payload: bytes) -> Message:
    """The reply message of a frame sent by a board: an acknowledgement's data, or a :class:`Nak`."""
    if command == NAK_COMMAND:
        return Nak.unpack(payload)
    if not command & REPLY_BIT or (command & ~REPLY_BIT) not in REPLIES:
        raise ProtocolError(f"0x{command:02x} is not a reply command")
    return REPLIES[command & ~REPLY_BIT].unpack(payload)


def reply_command(request_code: int) -> int:
    """The command byte of the acknowledgement of ``request_code``."""
    return request_code | REPLY_BIT
