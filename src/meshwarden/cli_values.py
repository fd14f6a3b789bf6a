"""Reading the values of `meshwarden set` as a person types them, before anything is sent.

``c03=0.4`` (a coupler's kappa, a phase in radians), ``p05=90 deg``, ``p05=1.2 rad``, ``c03=12 V``
(volts; ``--volts`` makes bare numbers volts). A name given twice, a gate attribute and its
actuator both, a typo (with the closest id suggested), NaN or infinity, an angle on a coupler,
and a request that mixes volts with logical values are all refused here, with the reason.
"""

from __future__ import annotations

import difflib
import math
import re
from typing import Any

from meshwarden.cli_common import UsageError
from meshwarden.errors import UnknownTargetRefused

VOLT_UNITS = {"V": 1.0, "mV": 1e-3}
ANGLE_UNITS = {"rad": 1.0, "mrad": 1e-3, "deg": math.pi / 180.0}
_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?|[-+]?(?:nan|inf|infinity))\s*(\S*)\s*$", re.I)


def parse_pairs(pairs: list[str], volts_flag: bool = False) -> tuple[dict[str, float], bool, set[str]]:
    """``ID=VALUE[ UNIT]`` items -> (values, whether they are volts, names given an angle unit)."""
    values: dict[str, float] = {}
    kinds: set[str] = set()
    angled: set[str] = set()
    for pair in pairs:
        key, sep, raw = pair.partition("=")
        key = key.strip()
        if not sep or not key or not raw.strip():
            raise UsageError(f"set: expected ID=VALUE (e.g. c03=0.4, p05=90 deg, c03=12 V), got {pair!r}")
        if key in values:
            raise UsageError(f"set: '{key}' is given twice in one request")
        match = _NUMBER.match(raw)
        if match is None:
            raise UsageError(f"set: {key}: {raw.strip()!r} is not a number with an optional unit (V, mV, rad, deg)")
        number = float(match.group(1))
        if not math.isfinite(number):
            raise UsageError(f"set: {key}: {raw.strip()} is not a value an output can take (NaN or infinity)")
        unit = match.group(2)
        if unit in VOLT_UNITS:
            kinds.add("volts")
            number *= VOLT_UNITS[unit]
        elif unit in ANGLE_UNITS:
            if volts_flag:
                raise UsageError(f"set: {key}: an angle ({unit}) with --volts")
            kinds.add("logical")
            angled.add(key)
            number *= ANGLE_UNITS[unit]
        elif unit == "":
            kinds.add("volts" if volts_flag else "logical")
        else:
            known = ", ".join([*VOLT_UNITS, *ANGLE_UNITS])
            raise UsageError(f"set: {key}: unknown unit {unit!r} (known: {known}; a coupling ratio has none)")
        values[key] = number
    if len(kinds) > 1:
        raise UsageError("set: one request is either all volts or all logical values; send them as two commands")
    return values, kinds == {"volts"}, angled


def suggestion(name: str, known: list[str]) -> str:
    close = difflib.get_close_matches(name, known, n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


def resolve_names(values: dict[str, float], view: dict[str, Any], angled: set[str] | None = None) -> dict[str, str]:
    """Name -> actuator id, using a `get` reply; refuses typos (with a suggestion), the same
    actuator named twice, and an angle given to a coupler."""
    actuators: dict[str, Any] = view["actuators"]
    gates: dict[str, dict[str, str]] = view.get("gates", {})
    known = [*actuators, *(f"{g}.{a}" for g in gates for a in ("kappa", "phase"))]
    out: dict[str, str] = {}
    for name in values:
        if name in actuators:
            aid = name
        else:
            gate, _, attribute = name.partition(".")
            if gate not in gates or attribute not in ("kappa", "phase"):
                raise UnknownTargetRefused(f"unknown target '{name}'{suggestion(name, known)}", target=name)
            aid = gates[gate]["coupler" if attribute == "kappa" else "phase"]
        if aid in out.values():
            first = next(n for n, a in out.items() if a == aid)
            raise UsageError(f"set: '{first}' and '{name}' both set actuator {aid}")
        if angled and name in angled and actuators[aid]["kind"] == "coupler":
            raise UsageError(f"set: {name} is a coupler (a coupling ratio 0..1), not an angle")
        out[name] = aid
    return out


def values_from_document(document: Any, volts_flag: bool) -> tuple[dict[str, float], bool]:
    """Values from a `get --json` reply or a saved settings file (``{"actuators": {ID: {...}}}``),
    or a plain ``{ID: number}`` object. Logical values when every entry has one (and not
    ``--volts``), else volts."""
    if isinstance(document, dict) and isinstance(document.get("actuators"), dict):
        entries = document["actuators"]
        if not entries or not all(isinstance(e, dict) and "volts" in e for e in entries.values()):
            raise UsageError("the file's 'actuators' must map ids to objects with 'volts' (as `get --json` writes)")
        logical = not volts_flag and all(isinstance(e.get("value"), int | float) for e in entries.values())
        key = "value" if logical else "volts"
        values = {aid: e[key] for aid, e in entries.items()}
        volts = not logical
    elif isinstance(document, dict) and document:
        values, volts = dict(document), volts_flag
    else:
        raise UsageError("expected a `get --json` reply, a saved settings file, or an object {ID: number}")
    for aid, v in values.items():
        if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
            raise UsageError(f"{aid}: {v!r} is not a finite number")
    return {k: float(v) for k, v in values.items()}, volts
