"""The one error tree of meshwarden.

Every error a user can meet is a :class:`MeshwardenError` with a stable ``code`` that the message
bus sends to clients and that tests assert on. The tree follows the phase of life in which the
error happens, so a caller can catch "anything wrong with the configuration" or "anything wrong
on the wire" without knowing the details::

    MeshwardenError                      code
    ├── ConfigError                      config          bad file, bad value, bad reference
    ├── CalibrationError                 calibration     a calibration table that cannot be used
    ├── LinkError                        link            a board cannot be reached or went away
    │   ├── LinkTimeout                  link_timeout    no answer in time
    │   └── BoardFaulted                 board_faulted   too many link errors: the board is out
    ├── ProtocolError                    protocol        bytes that do not decode as a frame
    │   ├── FramingError                 framing         COBS or length broken
    │   ├── ChecksumError                checksum        CRC mismatch
    │   └── BoardNakError                board_nak       the board refused a command
    ├── ReadbackError                    readback        a board latched other codes than written
    ├── AbortedError                     aborted         queued board work dropped by an emergency stop
    └── RefusedError                     refused         a request that would break a safety rule
        ├── LimitRefused                 limit           above a voltage limit
        ├── OutOfRangeRefused            out_of_range    a logical value outside the calibration's range
        │                                                (was UnreachableRefused / unreachable; the old
        │                                                class name remains an alias)
        ├── NotArmedRefused              not_armed       outputs may change only while armed
        ├── LeaseRefused                 lease           another client holds the actuator
        ├── UnknownTargetRefused         unknown_target  no actuator, gate or attribute of that name
        ├── FaultedRefused               faulted         a board needed for the request is faulted or unreachable
        │   └── UncertainRefused         uncertain       a board's outputs are in doubt until a re-read succeeds
        ├── BusyRefused                  busy            another owner's motion claim holds the actuator
        ├── StoppedRefused               stopped         motion stopped before its end (stop, disarm, estop)
        └── InterlockOpenRefused         interlock_open  arm while a watched hardware interlock is open

Foreign exceptions are re-raised ``from`` the original so the cause stays in the log.
"""

from __future__ import annotations

from typing import Any


class MeshwardenError(Exception):
    """Root of every error meshwarden raises on purpose."""

    code = "error"

    def __init__(self, message: str, **details: Any) -> None:
        super().__init__(message)
        self.message = message
        self.details = details

    def as_dict(self) -> dict[str, Any]:
        """The error as the bus sends it: stable code, human message, machine-readable details."""
        return {"code": self.code, "message": self.message, "details": dict(self.details)}


class ConfigError(MeshwardenError):
    """A configuration that cannot be used; carries every problem found, one per line."""

    code = "config"

    def __init__(self, issues: list[ConfigIssue]) -> None:
        self.issues = list(issues)
        super().__init__("\n".join(str(i) for i in self.issues) or "invalid configuration")


class ConfigIssue:
    """One problem in a configuration file, located to a file, a line and a dotted path."""

    __slots__ = ("file", "line", "message", "path")

    def __init__(self, file: str, line: int, path: str, message: str) -> None:
        self.file = file
        self.line = line
        self.path = path
        self.message = message

    def __str__(self) -> str:
        return f"{self.file}:{self.line}: {self.path or '<top>'}: {self.message}"

    def __repr__(self) -> str:
        return f"ConfigIssue({str(self)!r})"


class CalibrationError(MeshwardenError):
    """A calibration table that is malformed, not monotone or for another actuator."""

    code = "calibration"


class LinkError(MeshwardenError):
    """A board cannot be reached, or its link was lost."""

    code = "link"


class LinkTimeout(LinkError):
    """A board did not answer within its timeout (after retries)."""

    code = "link_timeout"


class BoardFaulted(LinkError):
    """A board whose link error rate passed its limit; the rack goes to its safe state."""

    code = "board_faulted"


class ProtocolError(MeshwardenError):
    """Bytes that do not form a valid frame of the board protocol."""

    code = "protocol"


class FramingError(ProtocolError):
    """The COBS encoding or the frame length is broken."""

    code = "framing"


class ChecksumError(ProtocolError):
    """The frame's CRC does not match its contents."""

    code = "checksum"


class BoardNakError(ProtocolError):
    """The board answered with a negative acknowledgement (bad channel, bad value, tripped ...)."""

    code = "board_nak"


class ReadbackError(MeshwardenError):
    """Codes read back from a board differ from what was written: a fault, never retried silently."""

    code = "readback"


class RefusedError(MeshwardenError):
    """A request refused because it would break a safety rule; nothing was changed."""

    code = "refused"


class LimitRefused(RefusedError):
    """A voltage above the channel's hard limit."""

    code = "limit"


class OutOfRangeRefused(RefusedError):
    """A logical value outside what the actuator's calibration can reach within its limit.

    Its code was ``unreachable`` before message schema 1.1, which read like "daemon unreachable"."""

    code = "out_of_range"


UnreachableRefused = OutOfRangeRefused  # the old name, kept so existing scripts still import it


class NotArmedRefused(RefusedError):
    """An output change away from zero while the daemon is disarmed or emergency-stopped."""

    code = "not_armed"


class LeaseRefused(RefusedError):
    """A write to an actuator leased by another client."""

    code = "lease"


class UnknownTargetRefused(RefusedError):
    """A request naming an actuator, gate or attribute that does not exist."""

    code = "unknown_target"


class FaultedRefused(RefusedError):
    """A request that needs a board which is faulted, unreachable or waiting to be restored."""

    code = "faulted"


class UncertainRefused(FaultedRefused):
    """Motion on a board whose outputs are in doubt (a write was not verified and the re-read
    that should follow it failed); refused until a read of the board succeeds."""

    code = "uncertain"


class BusyRefused(RefusedError):
    """Motion on an actuator that another owner's claim (a procedure, a lease) holds."""

    code = "busy"


class StoppedRefused(RefusedError):
    """Motion ended before its target by a stop request, a disarm or an emergency stop; the
    outputs are where the last verified step left them."""

    code = "stopped"


class InterlockOpenRefused(RefusedError):
    """``arm`` while a watched hardware interlock is open or cannot be read: close it, then arm."""

    code = "interlock_open"


class BusError(MeshwardenError):
    """A message on the bus that cannot be taken as a request; ``code`` says which rule it broke."""

    def __init__(self, code: str, message: str, **details: object) -> None:
        super().__init__(message, **details)
        self.code = code


class ForbiddenRefused(RefusedError):
    """A request beyond the role of the client's key (observer < operator < admin)."""

    code = "forbidden"


class UnreachableError(MeshwardenError):
    """The daemon did not answer within timeout x (retries + 1) (raised by the client only)."""

    code = "unreachable"


class AbortedError(MeshwardenError):
    """Board work that was queued, or retrying, when an emergency stop took the board."""

    code = "aborted"
