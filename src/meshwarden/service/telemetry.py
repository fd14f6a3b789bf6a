"""Telemetry on the PUB socket: every message carries one global sequence number.

Topics: ``state`` (arm/estop/board state changes), ``monitors`` (samples at the configured rate),
``event`` (faults, refusals, estop, resets), ``job`` (progress), ``heartbeat`` (once a second),
``scan`` (each fault scan's summary, and scheduled scans skipped),
``lock`` (each lock's state, error, residual and value: at every change of state, else at most 5 a second).
A subscriber detects loss (PUB drops at its high-water mark) by a gap in ``seq``; a late joiner
subscribes first, then asks for ``snapshot`` (which carries the current ``seq``) and discards
updates older than it.
"""

from __future__ import annotations

import contextlib
import time
from typing import Any

import zmq
import zmq.asyncio

from meshwarden.service.encoding import dumps

TOPICS = ("state", "monitors", "event", "job", "heartbeat", "scan", "lock")


class Telemetry:
    def __init__(self, socket: zmq.asyncio.Socket | None) -> None:
        self.socket = socket
        self.seq = 0

    def close(self) -> None:
        """Publish nothing more (the socket is about to close)."""
        self.socket = None

    async def publish(self, topic: str, body: dict[str, Any]) -> int:
        """Send ``body`` on ``topic``; returns its sequence number."""
        self.seq += 1
        message = {"seq": self.seq, "ts": time.time(), "topic": topic, **body}
        if self.socket is not None and not self.socket.closed:
            # zmq.Again at the high-water mark: subscribers see the gap in seq
            with contextlib.suppress(zmq.Again, zmq.ZMQError):
                await self.socket.send_multipart([topic.encode(), dumps(message)], flags=zmq.NOBLOCK)
        return self.seq
