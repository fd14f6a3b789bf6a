"""The golden examples of docs/protocol.md, read from the document itself, and what they mean."""

from __future__ import annotations

import re

from meshwarden.protocol import messages as m
from tests.conftest import REPO

_ROW = re.compile(r"^\| ([a-z-]+) \| `([0-9a-f ]+)` \|$")


def golden_rows() -> dict[str, bytes]:
    """name -> wire bytes, parsed from the table in docs/protocol.md."""
    rows = {}
    for line in (REPO / "docs" / "protocol.md").read_text(encoding="utf-8").splitlines():
        match = _ROW.match(line)
        if match:
            rows[match.group(1)] = bytes.fromhex(match.group(2))
    return rows


# name -> (address, seq, command byte, message), as the prose under the table states them.
MEANING: dict[str, tuple[int, int, int, m.Message]] = {
    "identify": (1, 1, 0x01, m.Identify()),
    "identify-reply": (
        1,
        1,
        0x81,
        m.IdentifyReply(
            "MW-HVD64-SIM", (1, 0, 0), 64, 32, 16, 16, 60000, 2500000, 4097, 3, (1000, 10000, 100000, 1000000)
        ),
    ),
    "write-outputs": (1, 2, 0x02, m.WriteOutputs(0, (0x8000, 0x1234, 0))),
    "write-outputs-reply": (1, 2, 0x82, m.OutputsReply(0, (0x8000, 0x1234, 0))),
    "read-outputs": (1, 3, 0x03, m.ReadOutputs(10, 2)),
    "read-sense-reply": (1, 4, 0x84, m.SenseReply(0, (30_000_000, -1500))),
    "read-monitors": (2, 5, 0x05, m.ReadMonitors(0, 3, 1000)),
    "read-monitors-reply": (2, 5, 0x85, m.MonitorsReply(0, 1000, (23600, 0, 65535))),
    "set-monitor-gain": (1, 6, 0x06, m.SetMonitorGain(4, (2, 2))),
    "configure-watchdog": (1, 7, 0x07, m.ConfigureWatchdog(30000, 2)),
    "heartbeat": (1, 8, 0x08, m.Heartbeat()),
    "heartbeat-reply": (1, 8, 0x88, m.HeartbeatReply(123456, 3)),
    "zero-all": (1, 9, 0x09, m.ZeroAll()),
    "status-reply": (1, 10, 0x8A, m.StatusReply(0x0005, 3, 123456, 0, 2, 1)),
    "nak-bad-channel": (1, 11, 0x7F, m.Nak(0x02, 5, 64)),
    "status-reply-interlock": (1, 12, 0x8A, m.StatusReply(0x0010, 3, 123456, 1500, 0, 0)),
}
