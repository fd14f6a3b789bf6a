"""Telemetry's two JSON encoders write the same document for what telemetry carries."""

from __future__ import annotations

import json
import math
from pathlib import Path

import orjson
import pytest

from meshwarden.service import encoding


def _with_orjson(value: object) -> bytes:
    return bytes(orjson.dumps(value, default=str))


MESSAGES = [
    {"seq": 7, "ts": 1764680000.123456, "topic": "monitors", "monitors": {"m00": {"amps": 1.234e-6, "watts": -5e-9}}},
    {"seq": 1, "topic": "event", "kind": "estop", "boards": {"b0": "zero"}, "path": Path("/var/x"), "none": None},
    {"seq": 2, "topic": "lock", "value": 0.1 + 0.2, "big": 2**53, "tiny": 5e-324, "list": [1, 2.5, "x", True]},
]


@pytest.mark.parametrize("message", MESSAGES)
def test_both_encoders_give_the_same_document(message: dict[str, object]) -> None:
    """Parsed back, the standard library's output and orjson's are equal (floats round-trip
    exactly in both: shortest repr, Python's json and orjson alike - from memory), key order kept."""
    plain = encoding._with_json(message)
    fast = _with_orjson(message)
    assert json.loads(plain) == json.loads(fast)
    assert list(json.loads(plain)) == list(message)


def test_the_installed_encoder_is_used_and_a_nan_is_never_silently_sent_by_json() -> None:
    """With the fast extra installed (the test environment has it), telemetry uses orjson; the
    fallback refuses a NaN rather than write invalid JSON."""
    assert encoding.ENCODER == "orjson"
    with pytest.raises(ValueError):
        encoding._with_json({"x": math.nan})
