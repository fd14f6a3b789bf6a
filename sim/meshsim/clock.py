"""Simulated time: the wall clock scaled, or a manual clock that tests advance by hand.

``--time-scale X`` makes simulated time run X times faster than the wall clock, so minutes of
dielectric charging or a 30 s watchdog can be exercised in a short test. Everything in the
simulator asks its clock, never ``time`` directly.
"""

from __future__ import annotations

import threading
import time


class SimClock:
    """Simulated seconds since start = wall seconds since start x ``time_scale``."""

    def __init__(self, time_scale: float = 1.0) -> None:
        if not time_scale > 0.0:
            raise ValueError(f"time scale must be positive, got {time_scale}")
        self.time_scale = time_scale
        self._start = time.monotonic()

    def now(self) -> float:
        return (time.monotonic() - self._start) * self.time_scale

    def wall_seconds(self, sim_seconds: float) -> float:
        """How long the wall clock takes for ``sim_seconds`` of simulated time."""
        return sim_seconds / self.time_scale


class ManualClock(SimClock):
    """A clock that moves only when told to: deterministic tests of watchdogs and drift."""

    def __init__(self, start: float = 0.0) -> None:
        super().__init__(1.0)
        self._now = start
        self._lock = threading.Lock()

    def now(self) -> float:
        with self._lock:
            return self._now

    def advance(self, seconds: float) -> float:
        with self._lock:
            self._now += seconds
            return self._now

    def wall_seconds(self, sim_seconds: float) -> float:
        return 0.0
