"""The bus message schema: every malformed request gets a specific error code."""

from __future__ import annotations

import json

import pytest

from meshwarden.errors import BusError
from meshwarden.service.schema import best_effort_id, parse_request


def req(**fields: object) -> bytes:
    base: dict[str, object] = {"v": 1, "id": "r1", "client": "t", "op": "status"}
    base.update(fields)
    return json.dumps({k: v for k, v in base.items() if v is not ...}).encode()


@pytest.mark.parametrize(
    ("data", "code"),
    [
        (b"\xff\xfe", "bad_json"),
        (b"{not json", "bad_json"),
        (b'{"v": 1, "id": "a", "client": "t", "op": "set", "args": {"values": {"c0": NaN}}}', "bad_json"),
        (b'{"v": 1, "id": "a", "client": "t", "op": "set", "args": {"values": {"c0": Infinity}}}', "bad_json"),
        (b"[1, 2]", "bad_request"),
        (req(v=2), "version"),
        (req(v=True), "version"),
        (req(id=...), "bad_request"),
        (req(id="has space"), "bad_request"),
        (req(client=7), "bad_request"),
        (req(op="fly"), "unknown_op"),
        (req(extra=1), "bad_request"),
        (req(op="set", args={}), "bad_request"),
        (req(op="set", args={"values": {}}), "bad_request"),
        (req(op="set", args={"values": {"c0": "high"}}), "bad_request"),
        (req(op="set", args={"values": {"c0": True}}), "bad_request"),
        (req(op="set", args={"values": {"c0": 1}, "volts": "yes"}), "bad_request"),
        (req(op="monitors", args={"average": 1.5}), "bad_request"),
        (req(op="monitors", args={"average": True}), "bad_request"),
        (req(op="lease", args={"targets": [1]}), "bad_request"),
        (req(op="status", args={"x": 1}), "bad_request"),
        (req(op="status", args=[]), "bad_request"),
        (b'{"v": 1, "id": "a", "id": "b", "client": "t", "op": "status"}', "bad_request"),
        (req(op="set", args={"values": {"c0": 10**400}}), "out_of_range"),
        (req(op="set", args={"values": {"c0": 1.5e6}}), "out_of_range"),
        (req(op="events", args={"since": -1}), "out_of_range"),
        (req(op="lease", args={"targets": ["g0"], "ttl_s": 0.09}), "out_of_range"),
        (req(op="release", args={"targets": ["g0"] * 10_001}), "out_of_range"),
        (req(op="recover", args={"board": "b" * 101}), "out_of_range"),
        (b'{"v": 1, "id": "a", "client": "t", "op": "monitors", "args": {"integration_s": 2e400}}', "bad_json"),
    ],
)
def test_malformed_requests_are_refused_with_a_code(data: bytes, code: str) -> None:
    """Every malformed request maps to its specific error code."""
    with pytest.raises(BusError) as err:
        parse_request(data)
    assert err.value.code == code


def test_valid_request_parses() -> None:
    """A well-formed request parses into its fields."""
    r = parse_request(req(op="set", args={"values": {"g0.kappa": 0.5}, "volts": False}))
    assert (r.id, r.client, r.op, r.args["values"]) == ("r1", "t", "set", {"g0.kappa": 0.5})


def test_reply_id_is_recovered_when_possible() -> None:
    """An error reply carries the request id whenever one can be read."""
    assert best_effort_id(req(op="fly")) == "r1"
    assert best_effort_id(b"{garbage") is None
