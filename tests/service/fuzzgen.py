"""A seeded generator of hostile command-bus messages, shared by the test suite (a few thousand)
and scripts/bench (100,000, with the daemon's memory before and after).

Each message comes with the request id a reply must carry (None when the message has no id that
can be read). The daemon is never armed by these messages (no ``arm``, ``restore`` or
``recover``), so no output may rise while they are sent.
"""

from __future__ import annotations

import json
import random
from collections.abc import Iterator
from dataclasses import dataclass

HUGE_INTEGERS = ["9" * 400, "-" + "9" * 400, "1" + "0" * 30, str(2**63), str(2**1023)]
BAD_FLOATS = ["1e308", "-1e308", "1e400", "-1e400", "NaN", "Infinity", "-Infinity", "5e-324", "1.7976931348623157e308"]
NUMBERS = [*HUGE_INTEGERS, *BAD_FLOATS, "0", "-5", "1", "0.5", "3600", "3600.5", "1000", "1001", "true", '"7"', "null"]
TARGETS = ["c0", "p0", "c1", "p1", "g0", "g1", "g0.kappa", "g1.phase", "zz", "g0.nope"]
OPS = ["status", "get", "snapshot", "monitors", "events", "jobs", "set", "lease", "release", "cancel", "fly", "estop"]
SAFE_OPS = ["status", "get", "snapshot", "jobs", "events"]


@dataclass(frozen=True)
class Message:
    frames: list[bytes]
    reply_id: str | None  # the id the reply must echo; None: the reply's id is null


def _args(rng: random.Random, op: str) -> str:
    number = rng.choice(NUMBERS)
    if op == "set":
        name = rng.choice(TARGETS)
        volts = rng.choice(["true", "false"])
        if rng.random() < 0.3:
            return f'{{"values": {{"{name}": {number}, "{name}": 0}}, "volts": {volts}}}'  # a duplicate key
        return f'{{"values": {{"{name}": {number}}}, "volts": {volts}, "wait": false}}'
    if op == "events":
        return f'{{"{rng.choice(["since", "limit"])}": {number}}}'
    if op == "lease":
        return f'{{"targets": ["{rng.choice(TARGETS)}"], "ttl_s": {number}}}'
    if op == "release":
        return f'{{"targets": ["{rng.choice(TARGETS)}"]}}'
    if op == "monitors":
        if rng.random() < 0.9:  # a valid read holds the board link: keep them rare
            return f'{{"{rng.choice(["average", "integration_s"])}": {number}, "average": 1000}}'
        return '{"average": 1, "integration_s": 0.0001}'
    if op == "cancel":
        return f'{{"job": "job-{rng.randrange(5)}"}}'
    if op == "estop":
        return '{"reason": "fuzz"}'
    return "{}" if rng.random() < 0.8 else f'{{"x": {number}}}'


def messages(count: int, seed: int, cap_bytes: int) -> Iterator[Message]:
    """``count`` messages from ``seed``; over-size ones are just above ``cap_bytes``."""
    rng = random.Random(seed)
    clients = [f"fz-{i}" for i in range(8)]
    for n in range(count):
        kind = rng.random()
        client = rng.choice(clients)
        if kind < 0.03:
            yield Message([rng.randbytes(rng.randrange(1, 200))], None)
            continue
        if kind < 0.05:  # an over-size message whose id is near its start
            request_id = f"big-{n}"
            head = f'{{"v": 1, "id": "{request_id}", "client": "{client}", "op": "set", "args": {{"pad": "'
            size = cap_bytes + 1 + rng.randrange(3 * cap_bytes)
            yield Message([head.encode() + b"x" * (size - len(head) - 3) + b'"}}'], request_id)
            continue
        if kind < 0.07:  # more than one body frame
            yield Message([b"{}"] * rng.randrange(2, 4), None)
            continue
        if kind < 0.10:  # a reused id: same client and id, another request
            request_id = f"reuse-{rng.randrange(4)}"
            op = rng.choice(SAFE_OPS)
            limit = rng.randrange(1, 4)
            args = f'{{"limit": {limit}}}' if op == "events" else "{}"
        else:
            request_id = f"r-{n}"
            op = rng.choice(OPS)
            args = _args(rng, op)
        text = f'{{"v": 1, "id": "{request_id}", "client": "{client}", "op": "{op}", "args": {args}}}'
        if rng.random() < 0.03:
            text = text[: rng.randrange(1, len(text))]  # cut short
            yield Message([text.encode()], None)
            continue
        if rng.random() < 0.02:
            text = text.replace('"v": 1', '"v": 1, "v": 2')
        yield Message([text.encode()], request_id)


def check_reply(message: Message, raw: bytes) -> dict[str, object]:
    """The reply, after checking it is well formed, echoes the id it must, and is never an
    internal error; raises AssertionError otherwise."""
    reply = json.loads(raw)
    assert reply["v"] == 1 and isinstance(reply["ok"], bool), reply
    if message.reply_id is not None:
        assert reply["id"] == message.reply_id, (reply, message.frames[0][:120])
    if not reply["ok"]:
        assert set(reply["error"]) == {"code", "message", "details"}, reply
        assert reply["error"]["code"] != "error", (reply, message.frames[0][:200])
    return dict(reply)


def run(endpoint: str, count: int, seed: int, cap_bytes: int, batch: int = 64) -> dict[str, int]:
    """Send ``count`` messages in batches of ``batch`` over one DEALER socket, check every reply;
    returns how many replies carried each error code (and ``ok``)."""
    import zmq

    codes: dict[str, int] = {}
    sock: zmq.Socket[bytes] = zmq.Context.instance().socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(endpoint)
    try:
        pending: dict[str | None, list[Message]] = {}
        stream = messages(count, seed, cap_bytes)
        sent = 0
        while sent < count:
            chunk = [m for _, m in zip(range(batch), stream, strict=False)]
            for message in chunk:
                sock.send_multipart(message.frames)
                pending.setdefault(message.reply_id, []).append(message)
            sent += len(chunk)
            for _ in chunk:
                assert sock.poll(30_000), "no reply within 30 s"
                raw = sock.recv()
                reply_id = json.loads(raw).get("id")
                waiting = pending.get(reply_id)
                assert waiting, f"a reply whose id was not expected: {raw[:200]!r}"
                message = waiting.pop(0)
                if not waiting:
                    pending.pop(message.reply_id)
                reply = check_reply(message, raw)
                code = "ok" if reply["ok"] else str(reply["error"]["code"])  # type: ignore[index]
                codes[code] = codes.get(code, 0) + 1
    finally:
        sock.close(0)
    return codes
