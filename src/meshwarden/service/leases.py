"""Leases: a client may reserve actuators; others are refused writes to them until it lets go.

A lease lasts ``ttl_s`` from its last renewal, so a client that disappears (crashed script,
closed notebook) loses its leases on its own; there is no state a vanished client leaves behind
for ever. Emergency stop ignores leases.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable

from meshwarden.errors import LeaseRefused

DEFAULT_TTL_S = 30.0
MAX_TTL_S = 3600.0


class Leases:
    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.clock = clock
        self._held: dict[str, tuple[str, float]] = {}  # actuator -> (client, expires)

    def _holder(self, actuator: str) -> str | None:
        held = self._held.get(actuator)
        if held is None:
            return None
        if held[1] <= self.clock():
            del self._held[actuator]
            return None
        return held[0]

    def acquire(self, client: str, actuators: Iterable[str], ttl_s: float = DEFAULT_TTL_S) -> float:
        """Take or renew leases on all of ``actuators`` - all or none. Returns the expiry (monotonic)."""
        wanted = list(actuators)
        self.check(client, wanted)
        expires = self.clock() + min(max(ttl_s, 0.1), MAX_TTL_S)
        for actuator in wanted:
            self._held[actuator] = (client, expires)
        return expires

    def release(self, client: str, actuators: Iterable[str]) -> None:
        for actuator in actuators:
            if self._holder(actuator) == client:
                del self._held[actuator]

    def check(self, client: str, actuators: Iterable[str]) -> None:
        """Refuse if any actuator is leased by another client."""
        for actuator in actuators:
            holder = self._holder(actuator)
            if holder is not None and holder != client:
                raise LeaseRefused(f"{actuator} is leased by client '{holder}'", actuator=actuator, holder=holder)

    def table(self) -> dict[str, str]:
        return {a: c for a in list(self._held) if (c := self._holder(a)) is not None}
