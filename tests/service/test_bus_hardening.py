"""Adversarial requests against the daemon as a process: bad numbers, ranges, duplicate keys,
reused ids and over-size messages each get a specific refusal, are journaled, change nothing."""

from __future__ import annotations

import json
from collections.abc import Iterator

import pytest
import zmq

from meshwarden.client import Client
from meshwarden.errors import MeshwardenError
from tests.control.bench import write_bench
from tests.service.daemon import Daemon, start_daemon

CAP = 8192


@pytest.fixture(scope="module")
def capped(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Daemon]:
    folder = tmp_path_factory.mktemp("hardening")
    config, _ = write_bench(folder)
    config.write_text(config.read_text().replace("journal:", f"service:\n  max_message_bytes: {CAP}\njournal:"))
    d = start_daemon(config, folder)
    yield d
    assert d.stop() == 0
    assert "Traceback" not in d.log.read_text()


@pytest.fixture
def raw(capped: Daemon) -> Iterator[zmq.Socket[bytes]]:
    sock: zmq.Socket[bytes] = zmq.Context.instance().socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(capped.endpoint)
    yield sock
    sock.close(0)


def ask(sock: zmq.Socket[bytes], data: bytes) -> dict[str, object]:
    sock.send(data)
    assert sock.poll(10_000), "no reply"
    reply: dict[str, object] = json.loads(sock.recv())
    return reply


def text(request_id: str, op: str, args: str) -> bytes:
    """A request written by hand, so numbers JSON libraries would not produce can be sent."""
    return f'{{"v": 1, "id": "{request_id}", "client": "adversary", "op": "{op}", "args": {args}}}'.encode()


HUGE = "9" * 400

BAD_NUMBERS = [
    ("set", '{"values": {"c0": 1e308}, "volts": true}', "out_of_range", "c0"),
    ("set", '{"values": {"c0": -1e308}, "volts": true}', "out_of_range", "c0"),
    ("set", f'{{"values": {{"c0": {HUGE}}}, "volts": true}}', "out_of_range", "integer of 400 digits"),
    ("set", f'{{"values": {{"g0.kappa": -{HUGE}}}}}', "out_of_range", "g0.kappa"),
    ("set", '{"values": {"c0": 1e400}, "volts": true}', "bad_json", "too large for a double"),
    ("set", '{"values": {"c0": NaN}}', "bad_json", "NaN"),
    ("set", '{"values": {"c0": -Infinity}}', "bad_json", "Infinity"),
    ("events", '{"since": 1000000000000000000000000000000}', "out_of_range", "'since' must be 0 to"),
    ("events", f'{{"since": {HUGE}}}', "out_of_range", "'since'"),
    ("events", '{"limit": 5000}', "out_of_range", "'limit' must be 1 to 1000"),
    ("events", '{"limit": 0}', "out_of_range", "'limit' must be 1 to 1000"),
    ("lease", '{"targets": ["g0"], "ttl_s": 1e308}', "out_of_range", "'ttl_s' must be 0.1 to 3600 s"),
    ("lease", '{"targets": ["g0"], "ttl_s": -5}', "out_of_range", "'ttl_s' must be 0.1 to 3600 s"),
    ("lease", f'{{"targets": ["g0"], "ttl_s": {HUGE}}}', "out_of_range", "'ttl_s'"),
    ("monitors", f'{{"average": {HUGE}}}', "out_of_range", "'average' must be 1 to 1000"),
    ("monitors", '{"average": 0}', "out_of_range", "'average' must be 1 to 1000"),
    ("monitors", '{"integration_s": 1e308}', "out_of_range", "'integration_s' must be 1e-06 to 1 s"),
    ("monitors", '{"integration_s": -1e308}', "out_of_range", "'integration_s'"),
    ("monitors", f'{{"integration_s": {HUGE}}}', "out_of_range", "'integration_s'"),
    ("monitors", '{"average": 1000, "integration_s": 1.0}', "out_of_range", "at most 10 s"),
]


@pytest.mark.parametrize(("op", "args", "code", "says"), BAD_NUMBERS)
def test_bad_numbers_get_a_specific_refusal_that_is_journaled(
    capped: Daemon, raw: zmq.Socket[bytes], op: str, args: str, code: str, says: str
) -> None:
    """A bad number gets its own code (never `error`) and a message naming the field and range;
    the refusal is journaled and nothing changes (no lease, no output moved)."""
    request_id = f"bad-{abs(hash((op, args))) % 10**9}"
    reply = ask(raw, text(request_id, op, args))
    assert reply["ok"] is False and reply["id"] == request_id
    error = reply["error"]
    assert isinstance(error, dict)
    assert error["code"] == code, error
    assert says in error["message"], error["message"]
    with capped.client() as mw:
        refusals = [
            e
            for e in mw.events(limit=1000)
            if e["kind"] == "command" and e["detail"].get("request") == request_id and e["detail"]["code"] == code
        ]
        state = mw.get()
        status = mw.status()
    assert refusals, "the refusal was not journaled"
    assert all(a["code"] == 0 for a in state["actuators"].values())
    assert status["leases"] == {}


def test_a_lease_duration_is_refused_not_clamped(capped: Daemon) -> None:
    """A lease of 1e308 s or -5 s is refused with the allowed range; one within range is granted
    for exactly what was asked."""
    with capped.client() as mw:
        for ttl in (1e308, -5.0, 0.05, 3600.5):
            with pytest.raises(MeshwardenError, match=r"'ttl_s' must be 0\.1 to 3600 s") as err:
                mw.lease(["g1"], ttl_s=ttl)
            assert err.value.code == "out_of_range"
        assert mw.status()["leases"] == {}
        granted = mw.lease(["g1"], ttl_s=0.5)
        assert granted["ttl_s"] == 0.5
        mw.release(["g1"])


def test_duplicate_keys_are_refused(capped: Daemon, raw: zmq.Socket[bytes]) -> None:
    """`{"op": "status", "op": "arm"}` is refused (bad_request) and does not arm; so is a key twice
    in a nested object."""
    reply = ask(raw, b'{"v": 1, "id": "dup-1", "client": "adversary", "op": "status", "op": "arm"}')
    assert reply["ok"] is False and reply["error"]["code"] == "bad_request"  # type: ignore[index]
    assert "'op' appears twice" in reply["error"]["message"]  # type: ignore[index]
    nested = text("dup-2", "set", '{"values": {"c0": 0, "c0": 30}, "volts": true}')
    reply = ask(raw, nested)
    assert reply["ok"] is False and reply["error"]["code"] == "bad_request"  # type: ignore[index]
    with capped.client() as mw:
        assert mw.status()["armed"] is False


def test_a_reused_id_with_another_request_is_refused(capped: Daemon, raw: zmq.Socket[bytes]) -> None:
    """The same client and id with a different body is refused, not answered with the first reply
    as if applied; the same body again gets the cached reply."""
    first = text("reuse-1", "events", '{"limit": 1}')
    assert ask(raw, first)["ok"] is True
    again = ask(raw, first)
    assert again["ok"] is True and again["id"] == "reuse-1"
    other = ask(raw, text("reuse-1", "events", '{"limit": 2}'))
    assert other["ok"] is False and other["id"] == "reuse-1"
    assert other["error"] == {  # type: ignore[comparison-overlap]
        "code": "bad_request",
        "message": "request id reused with a different request",
        "details": {"id": "reuse-1"},
    }
    with capped.client() as mw:
        kinds = [e["detail"].get("reason") for e in mw.events(limit=1000) if e["kind"] == "command"]
    assert "request id reused with a different request" in kinds


@pytest.mark.parametrize("size", [CAP + 1, 5 * CAP, 15 * CAP])
def test_an_over_size_message_is_answered_with_its_id(raw: zmq.Socket[bytes], size: int) -> None:
    """Over the cap - also beyond the 4x at which ZeroMQ used to drop the peer - the reply is
    `too_large` with the request id, sent at once."""
    head = text("big-1", "set", '{"values": {"c0": 1}, "pad": "')
    data = head + b"x" * (size - len(head) - 3) + b'"}}'
    assert len(data) == size
    reply = ask(raw, data)
    assert reply["id"] == "big-1" and reply["ok"] is False
    assert reply["error"]["code"] == "too_large"  # type: ignore[index]
    assert reply["error"]["details"] == {"size": size, "limit": CAP}  # type: ignore[index]


def test_the_client_refuses_an_over_size_request_before_sending() -> None:
    """The client library raises `too_large` at once, without sending (nothing listens here)."""
    mw = Client("tcp://127.0.0.1:9", timeout_s=0.3, retries=0, max_message_bytes=CAP)
    with mw, pytest.raises(MeshwardenError, match=f"exceeds the daemon's {CAP}-byte cap") as err:
        mw.set({f"name{i:05d}": 1.0 for i in range(1000)})
    assert err.value.code == "too_large"


def test_an_estop_is_never_refused_for_a_reused_id_or_a_long_reason(capped: Daemon, raw: zmq.Socket[bytes]) -> None:
    """An estop whose id was used before for another request still stops the rack; a long reason
    is journaled cut to its first 200 characters, not refused."""
    assert ask(raw, text("stop-1", "status", "{}"))["ok"] is True
    reply = ask(raw, text("stop-1", "estop", '{"reason": "' + "r" * 5000 + '"}'))
    assert reply["ok"] is True and reply["result"] == {"b0": "zero"}
    with capped.client() as mw:
        assert mw.status()["estopped"] is True
        stops = [e for e in mw.events(limit=1000) if e["kind"] == "estop"]
        mw.arm()
        mw.disarm()
    assert stops[-1]["detail"]["reason"] == "r" * 200


@pytest.mark.parametrize(
    ("op", "args"),
    [
        ("set", '{"values": {"' + "c" * 5000 + '": 1}}'),
        ("lease", '{"targets": ["' + "g" * 101 + '"]}'),
        ("cancel", '{"job": "' + "j" * 500 + '"}'),
    ],
)
def test_long_names_are_refused_before_they_are_echoed_or_journaled(raw: zmq.Socket[bytes], op: str, args: str) -> None:
    """Names longer than 100 characters are refused (out_of_range), and the reply stays short."""
    reply = ask(raw, text("long-1", op, args))
    assert reply["ok"] is False and reply["error"]["code"] == "out_of_range"  # type: ignore[index]
    assert len(json.dumps(reply)) < 1000


def test_a_client_allowed_more_than_the_daemon_gets_too_large_at_once(capped: Daemon) -> None:
    """A client configured for a larger cap than the daemon's gets `too_large` (its id read from
    the message's start) on the first try, instead of waiting out its retries."""
    with capped.client(timeout_s=5.0, retries=2, max_message_bytes=10 * CAP) as mw:
        with pytest.raises(MeshwardenError, match=f"exceeds the {CAP}-byte cap") as err:
            mw.set({f"name{i:05d}": 1.0 for i in range(1000)})
        assert err.value.code == "too_large"
        assert mw.status()["armed"] is False  # the client carries on
