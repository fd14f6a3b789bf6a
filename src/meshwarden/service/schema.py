"""Message schema version 1 of the command bus (docs/bus.md): parse requests, build replies.

A request is one JSON object::

    {"v": 1, "id": "r-17", "client": "notebook-3f2a", "op": "set", "args": {"values": {"c03": 0.5}}}

A reply echoes ``id``: ``{"v": 1, "id": ..., "ok": true, "result": {...}}`` or
``{"v": 1, "id": ..., "ok": false, "error": {"code", "message", "details"}}``. Everything a
request may carry is checked here before any handler sees it, and before any arithmetic on it:

* at the JSON level: NaN, infinities and numbers too large for a double (``json`` would
  otherwise accept them, or turn ``1e400`` into infinity), and objects that name a key twice
  (``json`` would keep the last one silently: ``{"op": "status", "op": "arm"}`` must not arm);
* per argument: its type, then its range (:data:`ARG_RANGES`). A number outside its range is
  refused with ``out_of_range``, naming the argument and the range - never clamped. Integers of
  any size are compared exactly (Python compares ``int`` with ``float`` without converting), so
  a 400-digit integer is refused here instead of overflowing a float conversion later.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from typing import Any

from meshwarden.errors import BusError, MeshwardenError
from meshwarden.service.leases import MAX_TTL_S, MIN_TTL_S

VERSION = 1
ID_PATTERN = re.compile(r"^[A-Za-z0-9_.:-]{1,64}$")

# op -> (role needed, {arg: (type(s), required)})
OPS: dict[str, tuple[str, dict[str, tuple[tuple[type, ...], bool]]]] = {
    "status": ("observer", {}),
    "get": ("observer", {}),
    "snapshot": ("observer", {}),
    "monitors": ("observer", {"average": ((int,), False), "integration_s": ((int, float), False)}),
    "events": ("observer", {"since": ((int,), False), "limit": ((int,), False)}),
    "jobs": ("observer", {}),
    "estop": ("observer", {"reason": ((str,), False)}),
    "set": ("operator", {"values": ((dict,), True), "volts": ((bool,), False), "wait": ((bool,), False)}),
    "lease": ("operator", {"targets": ((list,), True), "ttl_s": ((int, float), False)}),
    "release": ("operator", {"targets": ((list,), True)}),
    "cancel": ("operator", {"job": ((str,), True)}),
    "disarm": ("operator", {}),
    "arm": ("admin", {}),
    "restore": ("admin", {}),
    "recover": ("admin", {"board": ((str,), True)}),
    "job": ("observer", {"job": ((str,), True)}),
    "calibrate": (
        "admin",
        {
            "targets": ((list,), False),
            "points": ((int,), False),
            "activate": ((bool,), False),
            "wait": ((bool,), False),
        },
    ),
    "calibrations": ("observer", {}),
    "calibration_show": ("observer", {"version": ((str,), True), "sweeps": ((bool,), False)}),
    "calibration_activate": ("admin", {"version": ((str,), True)}),
    "scan": ("operator", {"targets": ((list,), False), "wait": ((bool,), False)}),
    "scans": ("observer", {"limit": ((int,), False)}),
    # closed-loop locks (docs/procedures.md)
    "lock_start": (
        "operator",
        {
            "name": ((str,), True),
            "actuator": ((str,), True),
            "monitor": ((str,), True),
            "hold": ((str,), True),
            "against": ((str,), False),
            "dither": ((int, float), False),
            "bandwidth_hz": ((int, float), False),
        },
    ),
    "locks": ("observer", {}),
    "lock_stop": ("operator", {"name": ((str,), False)}),
}
# (op, argument) -> (lowest, highest, unit) allowed, both inclusive
ARG_RANGES: dict[tuple[str, str], tuple[float, float, str]] = {
    ("monitors", "average"): (1, 1000, "acquisitions"),
    ("monitors", "integration_s"): (1e-6, 1.0, "s"),
    ("events", "since"): (0, 2**63 - 1, "(event id)"),
    ("events", "limit"): (1, 1000, "events"),
    ("lease", "ttl_s"): (MIN_TTL_S, MAX_TTL_S, "s"),
    ("calibrate", "points"): (12, 64, "points per sweep"),
    ("scans", "limit"): (1, 1000, "scans"),
    ("lock_start", "dither"): (1e-6, 1.0, "(rad or power coupling)"),
    ("lock_start", "bandwidth_hz"): (1e-3, 1000.0, "Hz"),
}
MAX_ACQUISITION_S = 10.0  # monitors: average x integration_s; the boards' links are shared
# A set value (volts, rad or power coupling) beyond this cannot mean anything on this hardware;
# refusing it here keeps every later conversion to float and to DAC codes finite.
MAX_SET_MAGNITUDE = 1e6
MAX_NAME_CHARS = 100  # an actuator, gate attribute, board or job id; longer names are refused
MAX_NAMES = 10_000  # names in one set, lease or release
MAX_REASON_CHARS = 200  # of an estop reason, what is journaled (the estop itself is never refused)
ROLES = ("observer", "operator", "admin")
READ_ONLY = {
    "status",
    "get",
    "snapshot",
    "monitors",
    "events",
    "jobs",
    "job",
    "calibrations",
    "calibration_show",
    "scans",
    "locks",
}


@dataclass(frozen=True)
class Request:
    id: str
    client: str
    op: str
    args: dict[str, Any] = field(default_factory=dict)


def _reject_constant(name: str) -> float:
    raise BusError("bad_json", f"{name} is not a number this bus accepts (no NaN or infinity)")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise BusError("bad_json", f"number {text[:40]} is too large for a double (at most about 1.8e308)")
    return value


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise BusError("bad_request", f"key '{key[:64]}' appears twice in one JSON object", key=key[:64])
        out[key] = value
    return out


def decode_json(data: bytes) -> Any:
    """``data`` as JSON, strictly: UTF-8, no NaN/infinity, finite doubles, no duplicate keys."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise BusError("bad_json", "message is not UTF-8 text") from None
    try:
        return json.loads(
            text, parse_constant=_reject_constant, parse_float=_finite_float, object_pairs_hook=_unique_keys
        )
    except BusError:
        raise
    except (ValueError, RecursionError) as exc:
        raise BusError("bad_json", f"message is not valid JSON: {str(exc)[:120]}") from None


def show_number(value: float) -> str:
    """A number for a message: huge integers by their length, not by their 400 digits."""
    if isinstance(value, int) and abs(value) >= 10**15:
        return f"an integer of {len(str(abs(value)))} digits"
    return f"{value:g}" if isinstance(value, float) else str(value)


def _check_range(op: str, name: str, value: Any) -> None:
    low, high, unit = ARG_RANGES[(op, name)]
    if not low <= value <= high:
        raise BusError(
            "out_of_range",
            f"{op}: '{name}' must be {show_number(low)} to {show_number(high)} {unit}, got {show_number(value)}",
            argument=name,
            allowed=[low, high],
        )


def parse_request(data: bytes) -> Request:
    """The request in ``data``, or a :class:`BusError` naming the first rule it breaks."""
    raw = decode_json(data)
    if not isinstance(raw, dict):
        raise BusError("bad_request", "a request must be a JSON object")
    unknown = sorted(set(raw) - {"v", "id", "client", "op", "args"})
    if unknown:
        raise BusError("bad_request", f"unknown field '{unknown[0]}'")
    if raw.get("v") != VERSION or isinstance(raw.get("v"), bool):
        raise BusError("version", f"unsupported message version {raw.get('v')!r}; this daemon speaks {VERSION}")
    for key in ("id", "client"):
        if not isinstance(raw.get(key), str) or not ID_PATTERN.match(raw[key]):
            raise BusError("bad_request", f"'{key}' must be 1-64 characters of letters, digits and _.:-")
    op = raw.get("op")
    if not isinstance(op, str) or op not in OPS:
        raise BusError("unknown_op", f"unknown operation {op!r}", known=sorted(OPS))
    args = raw.get("args", {})
    if not isinstance(args, dict):
        raise BusError("bad_request", "'args' must be an object")
    spec = OPS[op][1]
    for name in args:
        if name not in spec:
            raise BusError("bad_request", f"{op}: unknown argument '{name}'", allowed=sorted(spec))
    for name, (types, required) in spec.items():
        if name not in args:
            if required:
                raise BusError("bad_request", f"{op}: missing argument '{name}'")
            continue
        value = args[name]
        if (isinstance(value, bool) and bool not in types) or not isinstance(value, types):
            raise BusError("bad_request", f"{op}: argument '{name}' has the wrong type")
        if (op, name) in ARG_RANGES:
            _check_range(op, name, value)
    if op == "monitors":
        average, integration_s = args.get("average", 1), args.get("integration_s", 1e-3)
        if average * integration_s > MAX_ACQUISITION_S:  # both are in range: the product is finite
            raise BusError(
                "out_of_range",
                f"monitors: 'average' x 'integration_s' must be at most {MAX_ACQUISITION_S:g} s, got "
                f"{average * integration_s:g} s (the boards' links are shared with heartbeats and ramps)",
                argument="average",
                allowed=[0, MAX_ACQUISITION_S],
            )
    if op == "set":
        _check_set_values(args["values"])
    if op in ("lease", "release"):
        if not all(isinstance(t, str) for t in args["targets"]):
            raise BusError("bad_request", f"{op}: 'targets' must be a list of ids")
        _check_names(op, "targets", args["targets"])
    if op == "scan" and "targets" in args:
        if not all(isinstance(t, str) for t in args["targets"]):
            raise BusError("bad_request", "scan: 'targets' must be a list of ids")
        _check_names(op, "targets", args["targets"])
    if op in ("lock_start", "lock_stop"):
        _check_names(
            op, "names", [v for k, v in args.items() if k in ("name", "actuator", "monitor", "against", "hold")]
        )
    if op in ("cancel", "recover"):
        _check_names(op, "job" if op == "cancel" else "board", [args["job" if op == "cancel" else "board"]])
    return Request(raw["id"], raw["client"], op, args)


def _check_names(op: str, argument: str, names: Any) -> None:
    """Ids and names are short: a long one is refused before it is echoed or journaled."""
    if len(names) > MAX_NAMES:
        raise BusError("out_of_range", f"{op}: at most {MAX_NAMES} names in '{argument}', got {len(names)}")
    for name in names:
        if len(name) > MAX_NAME_CHARS:
            raise BusError(
                "out_of_range",
                f"{op}: a name in '{argument}' is {len(name)} characters long; at most {MAX_NAME_CHARS}",
                argument=argument,
            )


def _check_set_values(values: dict[str, Any]) -> None:
    if not values:
        raise BusError("bad_request", "set: 'values' is empty")
    _check_names("set", "values", list(values))
    for key, value in values.items():
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or (isinstance(value, float) and not math.isfinite(value))
        ):
            raise BusError("bad_request", f"set: value of '{key[:64]}' must be a finite number", target=key[:64])
        if not -MAX_SET_MAGNITUDE <= value <= MAX_SET_MAGNITUDE:
            raise BusError(
                "out_of_range",
                f"set: value of '{key[:64]}' must be {-MAX_SET_MAGNITUDE:g} to {MAX_SET_MAGNITUDE:g} (and then "
                f"within the actuator's limits), got {show_number(value)}",
                target=key[:64],
                allowed=[-MAX_SET_MAGNITUDE, MAX_SET_MAGNITUDE],
            )


def reply_ok(request_id: str, result: Any) -> bytes:
    return json.dumps(
        {"v": VERSION, "id": request_id, "ok": True, "result": result}, allow_nan=False, default=str
    ).encode()


def reply_error(request_id: str | None, error: MeshwardenError) -> bytes:
    return json.dumps(
        {"v": VERSION, "id": request_id, "ok": False, "error": error.as_dict()}, allow_nan=False, default=str
    ).encode()


def best_effort_id(data: bytes) -> str | None:
    """The request id of a message that failed validation, if one can be read, for the reply."""
    try:
        raw = json.loads(data.decode("utf-8"), parse_constant=lambda _: None)
    except (ValueError, UnicodeDecodeError, RecursionError):
        return None
    value = raw.get("id") if isinstance(raw, dict) else None
    return value if isinstance(value, str) and ID_PATTERN.match(value) else None


_ID_NEAR_START = re.compile(rb'^\s*\{[^{}\[\]]*?"id"\s*:\s*"([A-Za-z0-9_.:-]{1,64})"')
ID_PREFIX_BYTES = 4096


def id_from_prefix(data: bytes) -> str | None:
    """The request id of an over-size message, read from its first few KiB only (the whole
    message is not parsed): a top-level ``"id"`` ahead of any nested object or list, as every
    client that puts ``id`` before ``args`` writes it (the Python client does)."""
    match = _ID_NEAR_START.match(data[:ID_PREFIX_BYTES])
    return match.group(1).decode() if match else None
