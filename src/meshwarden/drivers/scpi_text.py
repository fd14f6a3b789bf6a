"""Reading and writing the text of SCPI instruments (IEEE 488.2 messages, SCPI 1999). Pure.

What the SCPI driver needs and nothing more: split a response message into its units, read the
numeric and string response data, the four fields of ``*IDN?``, an error queue entry of
``SYSTem:ERRor?`` and the class its number belongs to, and fill a command template. Every
function raises :class:`~meshwarden.errors.ProtocolError` on text it cannot read, so a garbled
line is a failed attempt like a bad CRC in the reference protocol.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from meshwarden.errors import ProtocolError
from meshwarden.protocol.messages import NakReason

# IEEE 488.2 section 8.7: NR1 (integer), NR2 (fixed point), NR3 (floating point) response data.
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
# SCPI 1999 Vol. 1 section 7.2.1: 9.9E37 is "overrange/infinity", 9.91E37 is "not a number".
SCPI_INFINITY = 9.9e37
SCPI_NAN = 9.91e37
_ERROR = re.compile(r'^([+-]?\d+)\s*,\s*"((?:[^"]|"")*)"\s*$')


@dataclass(frozen=True)
class InstrumentId:
    """The four fields of an ``*IDN?`` response (IEEE 488.2 section 10.14)."""

    manufacturer: str
    model: str
    serial: str
    firmware: str

    def firmware_version(self) -> tuple[int, int, int]:
        """The first three whole numbers of the firmware field (missing ones are 0)."""
        numbers = [int(n) % 256 for n in re.findall(r"\d+", self.firmware)[:3]]
        return (*numbers, *([0] * (3 - len(numbers))))  # type: ignore[return-value]

    def serial_number(self) -> int:
        """The serial field as a u32: its digits when it is a number, else a stable hash of it."""
        if self.serial.isdigit():
            return int(self.serial) & 0xFFFFFFFF
        value = 0x811C9DC5  # FNV-1a, 32 bits: stable across runs (Python's hash() is not)
        for byte in self.serial.encode("ascii", "replace"):
            value = ((value ^ byte) * 0x01000193) & 0xFFFFFFFF
        return value


@dataclass(frozen=True)
class QueueEntry:
    """One entry of the error/event queue: its number and text."""

    number: int
    text: str

    @property
    def is_error(self) -> bool:
        return self.number != 0


def split_units(line: str, expected: int) -> list[str]:
    """The response message units of ``line`` (separated by ``;`` outside quoted strings,
    IEEE 488.2 section 8.4.1); exactly ``expected`` of them or a ProtocolError."""
    units: list[str] = []
    current: list[str] = []
    quoted = False
    for char in line.strip():
        if char == '"':
            quoted = not quoted
        if char == ";" and not quoted:
            units.append("".join(current).strip())
            current = []
        else:
            current.append(char)
    units.append("".join(current).strip())
    if quoted:
        raise ProtocolError(f"unterminated string in response {line!r}")
    if len(units) != expected:
        raise ProtocolError(f"expected {expected} response unit(s), got {len(units)} in {line[:80]!r}")
    return units


def parse_number(text: str) -> float:
    """An NR1, NR2 or NR3 response; SCPI's overrange and not-a-number values are refused."""
    value = text.strip()
    if not _NUMBER.match(value):
        raise ProtocolError(f"not a number: {value[:40]!r}")
    number = float(value)
    if abs(number) >= SCPI_INFINITY or not math.isfinite(number):
        kind = "not a number" if math.isclose(abs(number), SCPI_NAN) else "overrange"
        raise ProtocolError(f"instrument reports {kind} ({value})")
    return number


def parse_integer(text: str) -> int:
    """An NR1 response."""
    value = text.strip()
    if not re.match(r"^[+-]?\d+$", value):
        raise ProtocolError(f"not a whole number: {value[:40]!r}")
    return int(value)


def parse_idn(text: str) -> InstrumentId:
    """``*IDN?``: manufacturer, model, serial number, firmware level, comma-separated; a field
    the instrument does not report is ``0`` (IEEE 488.2 section 10.14)."""
    fields = [f.strip() for f in text.strip().split(",")]
    if len(fields) != 4 or not fields[0] or not fields[1]:
        raise ProtocolError(f"*IDN? response is not four comma-separated fields: {text.strip()[:80]!r}")
    return InstrumentId(*fields)


def parse_error(text: str) -> QueueEntry:
    """``SYSTem:ERRor?``: ``<number>,"<text>"`` with ``""`` for a quote inside the text."""
    match = _ERROR.match(text.strip())
    if not match:
        raise ProtocolError(f"not an error queue entry: {text.strip()[:80]!r}")
    return QueueEntry(int(match.group(1)), match.group(2).replace('""', '"'))


def error_class(number: int) -> str:
    """Which class of the standard an error number belongs to (SCPI 1999 Vol. 2 ch. 21)."""
    if number == 0:
        return "no error"
    if number > 0:
        return "device-specific"
    classes = ("command", "execution", "device-specific", "query", "power on", "user request", "request control")
    hundreds = -number // 100  # -100..-199 -> 1, -200..-299 -> 2 ...
    if 1 <= hundreds <= len(classes):
        return classes[hundreds - 1]
    return "operation complete" if hundreds == 8 else "unknown"


def nak_reason(number: int) -> NakReason:
    """The reference protocol's refusal closest to a SCPI error, so the base class treats it
    like any board refusal (the board goes into doubt after a write)."""
    if number in (-222, -224):  # data out of range, illegal parameter value
        return NakReason.BAD_VALUE
    if number == -114:  # header suffix out of range: no such channel
        return NakReason.BAD_CHANNEL
    cls = error_class(number)
    if cls in ("command", "query"):
        return NakReason.UNKNOWN_COMMAND
    if cls == "execution":
        return NakReason.BAD_VALUE
    return NakReason.OUTPUT_FAULT


def render(template: str, **values: object) -> str:
    """Fill a command template (its placeholders were checked when the configuration was read)."""
    return template.format(**values)


def format_volts(volts: float) -> str:
    """A voltage as NR2 text with microvolt resolution (finer than any 16-bit DAC's LSB above 0.07 V
    full scale, so a code survives the round trip through text)."""
    return f"{volts:.6f}"


__all__ = [
    "InstrumentId",
    "QueueEntry",
    "error_class",
    "format_volts",
    "nak_reason",
    "parse_error",
    "parse_idn",
    "parse_integer",
    "parse_number",
    "render",
    "split_units",
]
