"""Leases: a client may reserve actuators; others are refused writes to them until it lets go.

A lease lasts ``ttl_s`` from its last renewal, so a client that disappears (crashed script,
closed notebook) loses its leases on its own; there is no state a vanished client leaves behind
for ever. A lease is a held motion claim with a time limit (:mod:`meshwarden.claims`): disarm and
an emergency stop end it, as they end every claim.

A lease is held by a *holder*: one string naming who is authenticated (the bus computes it in
one place, :func:`meshwarden.service.identity.holder_of`): the key's name under CURVE, so a
second key cannot take over a lease by sending the first one's client id. A duration outside
``MIN_TTL_S..MAX_TTL_S`` is refused, never clamped.
"""

from __future__ import annotations

from collections.abc import Iterable

from meshwarden.claims import LEASE, ClaimRegistry
from meshwarden.errors import BusError

DEFAULT_TTL_S = 30.0
MIN_TTL_S = 0.1
MAX_TTL_S = 3600.0


class Leases:
    """The bus's view of leases: held motion claims (purpose ``lease``) with a time limit, in the
    controller's claim registry - one ownership rule for leases, procedures and requests."""

    def __init__(self, claims: ClaimRegistry) -> None:
        self.claims = claims

    def acquire(self, holder: str, actuators: Iterable[str], ttl_s: float = DEFAULT_TTL_S) -> float:
        """Take or renew leases on all of ``actuators`` - all or none. Returns the expiry (monotonic)."""
        if not MIN_TTL_S <= ttl_s <= MAX_TTL_S:
            raise BusError(
                "out_of_range",
                f"lease: 'ttl_s' must be {MIN_TTL_S:g} to {MAX_TTL_S:g} s, got {ttl_s:g}",
                argument="ttl_s",
                allowed=[MIN_TTL_S, MAX_TTL_S],
            )
        return self.claims.hold_now(holder, actuators, ttl_s=ttl_s, purpose=LEASE).expires_at

    def release(self, holder: str, actuators: Iterable[str]) -> None:
        """Let go of ``actuators``; refuses (and releases none) if another holder has any of them."""
        self.claims.release_actuators(holder, actuators)

    def check(self, holder: str, actuators: Iterable[str]) -> None:
        """Refuse if any actuator is held (leased, or claimed by a procedure) by another holder."""
        self.claims.check(holder, actuators)

    def table(self) -> dict[str, str]:
        return self.claims.owners(LEASE)
