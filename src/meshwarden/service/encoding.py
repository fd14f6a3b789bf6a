"""Telemetry's JSON encoder: orjson when it is installed (the ``fast`` extra), else the standard
library's json module, with the same output for the values telemetry carries.

Measured on the development machine (scripts/bench, ``telemetry_throughput_ratio``): a monitors
message of 48 taps costs about 61 us to encode with json and a few with orjson, which is what
the publisher spends beyond the socket. Both write finite floats in their shortest round-trip
form, keys in insertion order, and anything else they do not know as ``str(value)``; readings
are finite by construction (a NaN would be published as null by orjson, refused by json).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any


def _with_json(value: Any) -> bytes:
    return json.dumps(value, allow_nan=False, default=str, separators=(",", ":")).encode()


def _pick() -> tuple[str, Callable[[Any], bytes]]:
    try:
        import orjson  # type: ignore[import-not-found, unused-ignore]
    except ImportError:
        return "json", _with_json

    def with_orjson(value: Any) -> bytes:
        return bytes(orjson.dumps(value, default=str))

    return "orjson", with_orjson


ENCODER, dumps = _pick()
