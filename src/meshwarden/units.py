"""Physical quantities in configuration files.

A field whose name carries its unit (``limit_volts``, ``dwell_s``) takes either a plain number in
that unit or a string with an explicit unit of the same dimension (``"2 ms"`` for ``dwell_s``).
A unit of the wrong dimension (``dwell_s: 5 V``) is an error rather than a silent misreading:
a millisecond read as a second, or millivolts read as volts, is exactly the wire-on-the-wrong-
channel kind of mistake the configuration checks exist to catch.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass


@dataclass(frozen=True)
class Dimension:
    """A physical dimension: its name for messages and the units it accepts, as factors to SI."""

    name: str
    si_unit: str
    factors: dict[str, float]


VOLTS = Dimension("voltage", "V", {"V": 1.0, "mV": 1e-3, "kV": 1e3, "uV": 1e-6, "µV": 1e-6})
SECONDS = Dimension("time", "s", {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9, "min": 60.0, "h": 3600.0})
OHMS = Dimension(
    "resistance",
    "ohm",
    {
        "ohm": 1.0,
        "Ohm": 1.0,
        "Ω": 1.0,
        "kohm": 1e3,
        "kOhm": 1e3,
        "kΩ": 1e3,
        "Mohm": 1e6,
        "MOhm": 1e6,
        "MΩ": 1e6,
        "V/A": 1.0,
    },
)
AMPERES = Dimension("current", "A", {"A": 1.0, "mA": 1e-3, "uA": 1e-6, "µA": 1e-6, "nA": 1e-9, "pA": 1e-12})
AMPS_PER_WATT = Dimension("responsivity", "A/W", {"A/W": 1.0, "mA/W": 1e-3, "mA/mW": 1.0})
HERTZ = Dimension("frequency", "Hz", {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6})
METRES = Dimension("length", "m", {"m": 1.0, "mm": 1e-3, "um": 1e-6, "µm": 1e-6, "nm": 1e-9})
WATTS = Dimension("power", "W", {"W": 1.0, "mW": 1e-3, "uW": 1e-6, "µW": 1e-6, "nW": 1e-9})
RADIANS = Dimension("angle", "rad", {"rad": 1.0, "mrad": 1e-3, "deg": math.pi / 180.0})

_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\s\d].*?)?\s*$")


class UnitError(ValueError):
    """A value that is not a number in the expected dimension; the message says what was expected."""


def parse_quantity(value: object, dimension: Dimension) -> float:
    """Return ``value`` in SI units of ``dimension``.

    Accepts an int or float (already in the SI unit) or a string ``"<number> <unit>"``. Booleans,
    NaN and infinities are refused: YAML reads ``yes`` as true, and a limit of NaN compares false
    against everything, which would silently disable a check.
    """
    if isinstance(value, bool):
        raise UnitError(f"expected a {dimension.name} in {dimension.si_unit}, got a boolean")
    if isinstance(value, int | float):
        number = float(value)
        unit = None
    elif isinstance(value, str):
        match = _QUANTITY.match(value)
        if not match:
            raise UnitError(f"expected a {dimension.name} such as '5 {dimension.si_unit}', got {value!r}")
        number = float(match.group(1))
        unit = match.group(2)
    else:
        raise UnitError(f"expected a {dimension.name} in {dimension.si_unit}, got {type(value).__name__}")
    if not math.isfinite(number):
        raise UnitError(f"expected a finite {dimension.name}, got {value!r}")
    if unit is None:
        return number
    if unit not in dimension.factors:
        known = ", ".join(sorted(dimension.factors))
        raise UnitError(f"unit {unit!r} is not a {dimension.name} unit (use one of: {known})")
    return number * dimension.factors[unit]
