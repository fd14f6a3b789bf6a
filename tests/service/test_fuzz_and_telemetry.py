"""Fuzzing the command socket, and the telemetry stream's sequence numbers."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.control.bench import write_bench
from tests.service import fuzzgen
from tests.service.daemon import Daemon, start_daemon

OPS = [
    "status",
    "get",
    "snapshot",
    "monitors",
    "events",
    "jobs",
    "set",
    "lease",
    "release",
    "cancel",
    "fly",
    "",
    "estop",
    "disarm",
]  # no arm or restore: the rack stays disarmed, so no output may rise

json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(-(10**12), 10**12)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)

requestish = st.fixed_dictionaries(
    {
        "v": st.sampled_from([1, 1, 1, 2, "1", None]),
        "id": st.one_of(st.text(max_size=70), st.integers()),
        "client": st.sampled_from(["fuzz", "", "x" * 80, "ok-client"]),
        "op": st.sampled_from(OPS),
        "args": st.one_of(
            st.dictionaries(
                st.sampled_from(
                    [
                        "values",
                        "volts",
                        "wait",
                        "average",
                        "integration_s",
                        "since",
                        "limit",
                        "targets",
                        "ttl_s",
                        "job",
                        "reason",
                        "bogus",
                    ]
                ),
                json_values,
                max_size=4,
            ),
            st.fixed_dictionaries(
                {
                    "values": st.dictionaries(
                        st.sampled_from(["c0", "p0", "g0.kappa", "g1.phase", "zz"]),
                        st.floats(-100, 100) | st.text(max_size=3),
                        max_size=3,
                    )
                }
            ),
            json_values,
        ),
    },
    optional={"extra": json_values},
)

messages = st.one_of(
    st.binary(max_size=300),
    requestish.map(lambda d: json.dumps(d).encode()),
    json_values.map(lambda v: json.dumps(v).encode()),
    requestish.map(lambda d: json.dumps(d).encode()[: max(1, len(json.dumps(d)) // 2)]),
    st.just(b'{"v":1,"id":"n","client":"f","op":"set","args":{"values":{"c0":NaN}}}'),
    st.just(b"x" * (1 << 16)),
    st.builds(
        lambda op, arg, number: f'{{"v":1,"id":"h","client":"f","op":"{op}","args":{{"{arg}":{number}}}}}'.encode(),
        st.sampled_from(["set", "events", "lease", "monitors"]),
        st.sampled_from(["since", "limit", "ttl_s", "average", "integration_s", "values"]),
        st.sampled_from(
            ["1e308", "-1e308", "1e400", "9" * 400, "-" + "9" * 400, '{"c0": 1e308}', '{"c0": 1, "c0": 2}']
        ),
    ),
    st.just(b'{"v":1,"id":"d","client":"f","op":"status","op":"arm"}'),
)


@pytest.fixture(scope="module")
def fuzz_daemon(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Daemon]:
    folder = tmp_path_factory.mktemp("fuzz")
    config, _ = write_bench(folder)
    # a small cap, so oversized messages are cheap to make
    text = config.read_text().replace("journal:", "service:\n  max_message_bytes: 8192\njournal:")
    config.write_text(text)
    d = start_daemon(config, folder)
    yield d
    assert d.stop() == 0
    assert "Traceback" not in d.log.read_text()


@pytest.fixture(scope="module")
def dealer(fuzz_daemon: Daemon) -> Iterator[zmq.Socket[bytes]]:
    sock: zmq.Socket[bytes] = zmq.Context.instance().socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(fuzz_daemon.endpoint)
    yield sock
    sock.close(0)


@settings(
    max_examples=10_000,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(messages, st.integers(1, 3))
def test_every_message_gets_a_reply_and_changes_nothing(
    dealer: zmq.Socket[bytes], fuzz_daemon: Daemon, message: bytes, frames: int
) -> None:
    """10,000 generated messages (garbage, broken JSON, wrong types, unknown ops, NaN, oversized,
    extra frames): each gets exactly one well-formed reply; the daemon stays up."""
    dealer.send_multipart([message] * frames)
    assert dealer.poll(5000), "no reply"
    reply = json.loads(dealer.recv())
    assert reply["v"] == 1 and isinstance(reply["ok"], bool)
    if not reply["ok"]:
        assert set(reply["error"]) == {"code", "message", "details"}
        assert reply["error"]["code"] != "error", reply  # an internal error is a bug, never an answer
    assert fuzz_daemon.proc.poll() is None


def test_seeded_hostile_messages_get_specific_replies(fuzz_daemon: Daemon) -> None:
    """10,000 seeded hostile messages (bad numbers, duplicate keys, reused ids, over-size, cut
    short, extra frames; 100,000 in scripts/bench): each reply echoes the readable request id
    and none is an internal error."""
    codes = fuzzgen.run(fuzz_daemon.endpoint, 10_000, seed=9, cap_bytes=8192)
    assert sum(codes.values()) == 10_000 and "error" not in codes
    assert {"out_of_range", "bad_json", "bad_request", "too_large", "too_many_frames"} <= set(codes)


def test_after_the_fuzz_no_output_moved(fuzz_daemon: Daemon, dealer: zmq.Socket[bytes]) -> None:
    """The rack was never armed during the fuzz, so every output is still at zero."""
    with fuzz_daemon.client() as mw:
        state = mw.get()
    assert not state["armed"]
    assert all(a["code"] == 0 for a in state["actuators"].values())


def test_telemetry_sequence_and_snapshot(tmp_path: Path) -> None:
    """Telemetry carries consecutive sequence numbers across topics; a snapshot gives the current
    seq, and later updates have larger ones (late joiners discard older updates)."""
    config, _ = write_bench(tmp_path)
    d = start_daemon(config, tmp_path)
    try:
        with d.client() as mw:
            stream = mw.subscribe(timeout_s=5)
            _, first = next(stream)
            snap = mw.snapshot()
            mw.arm()
            seen = [first]
            for topic, message in stream:
                assert topic != "gap"
                seen.append(message)
                if topic == "state" and message.get("armed"):
                    break
            seqs = [m["seq"] for m in seen]
            assert seqs == list(range(seqs[0], seqs[0] + len(seqs)))
            assert seen[-1]["seq"] > snap["seq"] >= first["seq"]
            topics = {m["topic"] for m in seen}
            assert {"heartbeat", "state"} <= topics or {"monitors", "state"} <= topics
    finally:
        d.stop()
