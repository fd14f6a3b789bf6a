"""Who sent a request: the one place that turns the authenticated key into the names the rest
of the daemon uses.

Under CURVE the daemon knows which allowed key sent each message (ZeroMQ's ``User-Id``), and
that key's configured *name* is the identity: leases are held by it, the journal records it,
and replies are cached under it. The ``client`` string inside a request is chosen by the
sender, so it is only a label - a second key that copies another's client id gains nothing.
On loopback without CURVE nobody is authenticated (everyone is admin); the identity is then
``local`` and a lease holder is told apart by its client id alone.
"""

from __future__ import annotations

from dataclasses import dataclass

LOCAL = "local"


@dataclass(frozen=True)
class Sender:
    """The authenticated side of a request: ``identity`` is the key's name (or ``local``)."""

    identity: str
    role: str
    authenticated: bool

    def holder(self, client: str) -> str:
        """The name that holds leases and is journaled as the request's ``client``: the key's
        name under CURVE; ``CLIENT@local`` on an unauthenticated loopback bus."""
        return self.identity if self.authenticated else f"{client}@{self.identity}"
