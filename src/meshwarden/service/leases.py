"""Leases: a client may reserve actuators; others are refused writes to them until it lets go.

A lease lasts ``ttl_s`` from its last renewal, so a client that disappears (crashed script,
closed notebook) loses its leases on its own; there is no state a vanished client leaves behind
for ever. Emergency stop ignores leases.

A lease is held by a *holder*: one string naming who is authenticated (the bus computes it in
one place, :func:`meshwarden.service.identity.holder_of`): the key's name under CURVE, so a
second key cannot take over a lease by sending the first one's client id. A duration outside
``MIN_TTL_S..MAX_TTL_S`` is refused, never clamped.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable

from meshwarden.errors import BusError, LeaseRefused

DEFAULT_TTL_S = 30.0
MIN_TTL_S = 0.1
MAX_TTL_S = 3600.0


class Leases:
    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.clock = clock
        self._held: dict[str, tuple[str, float]] = {}  # actuator -> (holder, expires)

    def _holder(self, actuator: str) -> str | None:
        held = self._held.get(actuator)
        if held is None:
            return None
        if held[1] <= self.clock():
            del self._held[actuator]
            return None
        return held[0]

    def acquire(self, holder: str, actuators: Iterable[str], ttl_s: float = DEFAULT_TTL_S) -> float:
        """Take or renew leases on all of ``actuators`` - all or none. Returns the expiry (monotonic)."""
        if not MIN_TTL_S <= ttl_s <= MAX_TTL_S:
            raise BusError(
                "out_of_range",
                f"lease: 'ttl_s' must be {MIN_TTL_S:g} to {MAX_TTL_S:g} s, got {ttl_s:g}",
                argument="ttl_s",
                allowed=[MIN_TTL_S, MAX_TTL_S],
            )
        wanted = list(actuators)
        self.check(holder, wanted)
        expires = self.clock() + ttl_s
        for actuator in wanted:
            self._held[actuator] = (holder, expires)
        return expires

    def release(self, holder: str, actuators: Iterable[str]) -> None:
        """Let go of ``actuators``; refuses (and releases none) if another holder has any of them."""
        wanted = list(actuators)
        self.check(holder, wanted)
        for actuator in wanted:
            if self._holder(actuator) == holder:
                del self._held[actuator]

    def check(self, holder: str, actuators: Iterable[str]) -> None:
        """Refuse if any actuator is leased by another holder."""
        for actuator in actuators:
            current = self._holder(actuator)
            if current is not None and current != holder:
                raise LeaseRefused(f"{actuator} is leased by '{current}'", actuator=actuator, holder=current)

    def table(self) -> dict[str, str]:
        return {a: c for a in list(self._held) if (c := self._holder(a)) is not None}
