"""Per-actuator calibration tables: measured (or design-nominal) logical value versus volts.

One YAML file per actuator, versioned, so that a recalibration of one drifted actuator is one
new file and the journal can say which version was in force when a target was set::

    format: meshwarden-calibration/1
    actuator: c00
    kind: coupler            # coupler: value is the power coupling ratio kappa (0..1)
    version: "2026-12-02a"   # phase:   value is the optical phase in radians
    origin: design-nominal   # design-nominal | measured
    note: free text
    volts:  [0.0, 1.0, ...]  # strictly increasing, starting at 0 V
    values: [0.0, 0.001, ...] # strictly increasing with volts

Only the table's shape is checked here; interpolation lives in the mapping layer.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from meshwarden.errors import CalibrationError

FORMAT = "meshwarden-calibration/1"
ORIGINS = ("design-nominal", "measured")
_KEYS = {"format", "actuator", "kind", "version", "origin", "note", "volts", "values"}

_Loader: Any = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


@dataclass(frozen=True)
class CalibrationTable:
    """A monotone table of logical value against volts for one actuator."""

    actuator: str
    kind: str
    version: str
    origin: str
    volts: tuple[float, ...]
    values: tuple[float, ...]
    note: str = ""

    def as_dict(self) -> dict[str, Any]:
        """The file's content, for writing a table back out."""
        return {
            "format": FORMAT,
            "actuator": self.actuator,
            "kind": self.kind,
            "version": self.version,
            "origin": self.origin,
            "note": self.note,
            "volts": list(self.volts),
            "values": list(self.values),
        }


def _numbers(raw: Any, name: str) -> tuple[float, ...]:
    if not isinstance(raw, list) or len(raw) < 2:
        raise CalibrationError(f"'{name}' must be a list of at least two numbers")
    out = []
    for i, item in enumerate(raw):
        if isinstance(item, bool) or not isinstance(item, int | float) or not math.isfinite(item):
            raise CalibrationError(f"'{name}[{i}]' must be a finite number, got {item!r}")
        out.append(float(item))
    return tuple(out)


def table_from_dict(raw: Any) -> CalibrationTable:
    """Check and build a table from a file's parsed content."""
    if not isinstance(raw, dict):
        raise CalibrationError("a calibration file must be a mapping")
    unknown = sorted(set(raw) - _KEYS)
    if unknown:
        raise CalibrationError(f"unknown key '{unknown[0]}' (known: {', '.join(sorted(_KEYS))})")
    if raw.get("format") != FORMAT:
        raise CalibrationError(f"format must be '{FORMAT}', got {raw.get('format')!r}")
    for key in ("actuator", "kind", "version", "origin"):
        if not isinstance(raw.get(key), str) or not raw[key]:
            raise CalibrationError(f"'{key}' must be a non-empty string")
    if raw["kind"] not in ("phase", "coupler"):
        raise CalibrationError(f"kind must be 'phase' or 'coupler', got {raw['kind']!r}")
    if raw["origin"] not in ORIGINS:
        raise CalibrationError(f"origin must be one of {', '.join(ORIGINS)}, got {raw['origin']!r}")
    volts = _numbers(raw.get("volts"), "volts")
    values = _numbers(raw.get("values"), "values")
    if len(volts) != len(values):
        raise CalibrationError(f"'volts' has {len(volts)} points but 'values' has {len(values)}")
    if volts[0] != 0.0:
        raise CalibrationError(f"the table must start at 0 V, it starts at {volts[0]} V")
    for i in range(1, len(volts)):
        if volts[i] <= volts[i - 1]:
            raise CalibrationError(f"volts must increase strictly: volts[{i}] = {volts[i]} <= {volts[i - 1]}")
        if values[i] <= values[i - 1]:
            raise CalibrationError(
                f"values must increase strictly with volts: values[{i}] = {values[i]} <= {values[i - 1]}"
            )
    if raw["kind"] == "coupler" and (values[0] < 0.0 or values[-1] > 1.0):
        raise CalibrationError("a coupler's values are power coupling ratios and must lie in [0, 1]")
    return CalibrationTable(
        actuator=raw["actuator"],
        kind=raw["kind"],
        version=raw["version"],
        origin=raw["origin"],
        volts=volts,
        values=values,
        note=str(raw.get("note", "")),
    )


def load_calibration(path: Path) -> CalibrationTable:
    """Read and check one calibration file; every failure is a :class:`CalibrationError`."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise CalibrationError(f"calibration file not found: {path}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise CalibrationError(f"cannot read calibration file {path}: {exc}") from None
    try:
        raw = yaml.load(text, Loader=_Loader)
    except yaml.YAMLError as exc:
        raise CalibrationError(f"calibration file {path} is not valid YAML: {exc}") from None
    return table_from_dict(raw)


def dump_calibration(table: CalibrationTable) -> str:
    """The YAML text of a table, in the file format above."""
    return str(yaml.safe_dump(table.as_dict(), sort_keys=False, default_flow_style=None, width=100))
