"""Faults to inject: broken devices, broken channels, broken boards and broken links.

Spec syntax (``--faults``, ``;``-separated; also :func:`parse_faults` in-process)::

    stuck:c03                  actuator stays where it is, whatever it is driven with
    open_wire:p10              actuator sees 0 V; the board's sense still reads the command
    dead_channel:b0:12         output stage dead: output and sense 0 V
    short:b1:5[=0.6]           output sags to the given fraction of the command; sense shows it
    dead_monitor:m04           input reads only its dark level
    saturated_monitor:m05      input reads the top ADC code
    noisy_monitor:m06=1e-6     extra input noise, amps rms
    reset:b0@12.5              board b0 resets (brown-out) at simulated time 12.5 s
    corrupt:b0=0.01            link faults: rate per frame, on board b0 or * for every board
    drop:*=0.01  repeat:*=0.01  garbage:*=0.01  wrong_address:*=0.01
    delay:b0=0.05/0.3          5 % of replies delayed by 0.3 s
    unplug:b1@10-20            link silent from 10 s to 20 s (simulated time)
    interlock:b0@10-20         b0's interlock contact open from 10 s to 20 s (no time: open now,
                               for good; one time: open from then on); ``SimRack.set_interlock``
                               opens and closes it in-process

The link classes follow the transmission errors a safety-rated fieldbus must defend against
(IEC 61784-3: corruption, loss, repetition, insertion, delay, masquerade/wrong address).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

LINK_KINDS = ("corrupt", "drop", "repeat", "garbage", "wrong_address", "delay")
DEVICE_KINDS = ("stuck", "open_wire")
CHANNEL_KINDS = ("dead_channel", "short")
MONITOR_KINDS = ("dead_monitor", "saturated_monitor", "noisy_monitor")
BOARD_KINDS = ("reset", "unplug", "interlock")
ALL_KINDS = LINK_KINDS + DEVICE_KINDS + CHANNEL_KINDS + MONITOR_KINDS + BOARD_KINDS


class FaultSpecError(ValueError):
    """A fault spec that cannot be read; the message quotes the item and says what was expected."""


@dataclass(frozen=True)
class Fault:
    """One injected fault. ``target`` is an actuator, monitor, board or BOARD:CHANNEL; ``*`` = every board."""

    kind: str
    target: str
    value: float = 0.0
    extra: float = 0.0
    at_s: float | None = None
    until_s: float | None = None


_ITEM = re.compile(
    r"^(?P<kind>[a-z_]+):(?P<target>[A-Za-z0-9_*-]+(?::\d+)?)"
    r"(?:=(?P<value>[-+0-9.eE]+)(?:/(?P<extra>[-+0-9.eE]+))?)?"
    r"(?:@(?P<at>[0-9.eE+]+)(?:-(?P<until>[0-9.eE+]+))?)?$"
)

_DEFAULT_VALUE = {"short": 0.6, "delay": 0.0}


def parse_faults(spec: str) -> list[Fault]:
    """Parse a ``;``-separated fault spec."""
    faults = []
    for raw in spec.split(";"):
        item = raw.strip()
        if not item:
            continue
        match = _ITEM.match(item)
        if not match:
            raise FaultSpecError(f"cannot read fault {item!r}: expected KIND:TARGET[=VALUE[/EXTRA]][@TIME[-UNTIL]]")
        kind = match["kind"]
        if kind not in ALL_KINDS:
            raise FaultSpecError(f"unknown fault kind {kind!r} in {item!r} (known: {', '.join(ALL_KINDS)})")
        try:
            value = float(match["value"]) if match["value"] else _DEFAULT_VALUE.get(kind, 0.0)
            extra = float(match["extra"]) if match["extra"] else (0.2 if kind == "delay" else 0.0)
            at = float(match["at"]) if match["at"] else None
            until = float(match["until"]) if match["until"] else None
        except ValueError:
            raise FaultSpecError(f"bad number in fault {item!r}") from None
        if kind in LINK_KINDS and not 0.0 <= value <= 1.0:
            raise FaultSpecError(f"{item!r}: a link fault rate must be between 0 and 1")
        if kind in ("reset", "unplug") and at is None:
            raise FaultSpecError(f"{item!r}: {kind} needs a time, e.g. {kind}:b0@10")
        if kind == "unplug" and until is None:
            raise FaultSpecError(f"{item!r}: unplug needs a time range, e.g. unplug:b0@10-20")
        if kind in CHANNEL_KINDS and ":" not in match["target"]:
            raise FaultSpecError(f"{item!r}: {kind} needs BOARD:CHANNEL")
        faults.append(Fault(kind, match["target"], value, extra, at, until))
    return faults
