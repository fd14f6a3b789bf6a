"""Message schema version 1 of the command bus (docs/bus.md): parse requests, build replies.

A request is one JSON object::

    {"v": 1, "id": "r-17", "client": "notebook-3f2a", "op": "set", "args": {"values": {"c03": 0.5}}}

A reply echoes ``id``: ``{"v": 1, "id": ..., "ok": true, "result": {...}}`` or
``{"v": 1, "id": ..., "ok": false, "error": {"code", "message", "details"}}``. Everything a
request may carry is checked here before any handler sees it; NaN and infinities are refused at
the JSON level (``json`` would otherwise accept them).
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from typing import Any

from meshwarden.errors import BusError, MeshwardenError

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
}
ROLES = ("observer", "operator", "admin")
READ_ONLY = {"status", "get", "snapshot", "monitors", "events", "jobs"}


@dataclass(frozen=True)
class Request:
    id: str
    client: str
    op: str
    args: dict[str, Any] = field(default_factory=dict)


def _reject_constant(name: str) -> float:
    raise BusError("bad_json", f"{name} is not a number this bus accepts (no NaN or infinity)")


def parse_request(data: bytes) -> Request:
    """The request in ``data``, or a :class:`BusError` naming the first rule it breaks."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise BusError("bad_json", "message is not UTF-8 text") from None
    try:
        raw = json.loads(text, parse_constant=_reject_constant)
    except BusError:
        raise
    except (ValueError, RecursionError) as exc:
        raise BusError("bad_json", f"message is not valid JSON: {str(exc)[:120]}") from None
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
    if op == "set":
        values = args["values"]
        if not values:
            raise BusError("bad_request", "set: 'values' is empty")
        for key, value in values.items():
            if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
                raise BusError("bad_request", f"set: value of '{key}' must be a finite number")
    if op in ("lease", "release") and not all(isinstance(t, str) for t in args["targets"]):
        raise BusError("bad_request", f"{op}: 'targets' must be a list of ids")
    return Request(raw["id"], raw["client"], op, args)


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
