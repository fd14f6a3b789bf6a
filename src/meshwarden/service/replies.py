"""The reply cache: what makes a resent request safe, with a bound on what it may cost.

A client that loses a reply sends the same request again (same ``client`` and ``id``); the
daemon answers from this cache (or waits for the reply still being computed), so a command is
never applied twice. Entries are keyed by (authenticated identity, client, id): under CURVE one
key cannot read, or pre-empt, another key's replies by guessing its ids. Each entry keeps a
digest of the request, and a reused id with a *different* request is refused instead of being
answered with the old reply, as if applied.

Bounds (all enforced on every insertion):

* per (identity, client): :data:`PER_CLIENT` entries, oldest evicted;
* per identity: :data:`CLIENTS_PER_IDENTITY` client ids, the least recently used evicted;
* in bytes: the reply bodies plus :data:`ENTRY_OVERHEAD_BYTES` per entry stay within
  ``max_bytes``. The oldest finished entry of the identity that holds the most bytes goes first,
  so one key flooding the cache with large replies evicts its own entries, not another key's
  small ``set`` replies. Entries still being computed are not evicted for bytes.

An evicted entry is forgotten: a resend of it runs again.
"""

from __future__ import annotations

import asyncio
import hashlib
import json
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

from meshwarden.errors import BusError

PER_CLIENT = 256
CLIENTS_PER_IDENTITY = 1024
ENTRY_OVERHEAD_BYTES = 512  # a rough allowance for the Python objects of one entry (future, keys, digest)

Key = tuple[str, str, str]  # (identity, client, request id)


def request_digest(op: str, args: dict[str, Any]) -> bytes:
    """A digest of what a request asks for (its operation and arguments, key order ignored)."""
    return hashlib.sha256(json.dumps([op, args], sort_keys=True, separators=(",", ":")).encode()).digest()


@dataclass
class _Entry:
    digest: bytes
    future: asyncio.Future[bytes]
    size: int = ENTRY_OVERHEAD_BYTES
    done: bool = False


@dataclass
class _Identity:
    entries: OrderedDict[tuple[str, str], _Entry] = field(default_factory=OrderedDict)  # (client, id), oldest first
    clients: OrderedDict[str, OrderedDict[str, None]] = field(default_factory=OrderedDict)  # LRU client -> ids
    size: int = 0


class ReplyCache:
    """Replies by (identity, client, id), bounded in entries and in bytes."""

    def __init__(self, max_bytes: int) -> None:
        self.max_bytes = max_bytes
        self._identities: dict[str, _Identity] = {}
        self.size = 0

    def __len__(self) -> int:
        return sum(len(i.entries) for i in self._identities.values())

    def get(self, key: Key, digest: bytes) -> asyncio.Future[bytes] | None:
        """The reply (done or pending) of an earlier request with this key, or None; refuses a
        reused id whose request differs."""
        identity, client, request_id = key
        owner = self._identities.get(identity)
        entry = owner.entries.get((client, request_id)) if owner is not None else None
        if entry is None:
            return None
        if entry.digest != digest:
            raise BusError(
                "bad_request",
                "request id reused with a different request",
                id=request_id,
            )
        return entry.future

    def add(self, key: Key, digest: bytes) -> asyncio.Future[bytes]:
        """A pending entry for a new request; settle it with :meth:`settle`."""
        identity, client, request_id = key
        owner = self._identities.setdefault(identity, _Identity())
        future: asyncio.Future[bytes] = asyncio.get_running_loop().create_future()
        entry = _Entry(digest, future)
        owner.entries[(client, request_id)] = entry
        ids = owner.clients.setdefault(client, OrderedDict())
        owner.clients.move_to_end(client)
        ids[request_id] = None
        self._grow(owner, entry.size)
        while len(ids) > PER_CLIENT:
            self._drop(identity, client, next(iter(ids)))
        while len(owner.clients) > CLIENTS_PER_IDENTITY:
            oldest_client = next(iter(owner.clients))
            for old_id in list(owner.clients[oldest_client]):
                self._drop(identity, oldest_client, old_id)
        self._fit()
        return future

    def settle(self, key: Key, reply: bytes) -> None:
        """Record the reply of a pending entry (and answer whoever waits for it)."""
        identity, client, request_id = key
        owner = self._identities.get(identity)
        entry = owner.entries.get((client, request_id)) if owner is not None else None
        if entry is None or owner is None:  # evicted while it ran: nothing to keep
            return
        if not entry.future.done():
            entry.future.set_result(reply)
        entry.done = True
        self._grow(owner, len(reply))
        entry.size += len(reply)
        self._fit()

    def forget(self, key: Key) -> None:
        """Drop an entry whose request was cancelled (a resend runs it again)."""
        identity, client, request_id = key
        owner = self._identities.get(identity)
        if owner is not None and (client, request_id) in owner.entries:
            entry = owner.entries[(client, request_id)]
            if not entry.future.done():
                entry.future.cancel()
            self._drop(identity, client, request_id)

    # ------------------------------------------------------------------ bookkeeping

    def _grow(self, owner: _Identity, size: int) -> None:
        owner.size += size
        self.size += size

    def _drop(self, identity: str, client: str, request_id: str) -> None:
        owner = self._identities[identity]
        entry = owner.entries.pop((client, request_id))
        self._grow(owner, -entry.size)
        ids = owner.clients[client]
        del ids[request_id]
        if not ids:
            del owner.clients[client]
        if not owner.entries:
            del self._identities[identity]

    def _fit(self) -> None:
        """Evict finished entries, heaviest identity first, oldest first, until within bytes."""
        while self.size > self.max_bytes:
            heaviest = sorted(self._identities.items(), key=lambda item: item[1].size, reverse=True)
            for identity, owner in heaviest:
                victim = next(((c, i) for (c, i), e in owner.entries.items() if e.done), None)
                if victim is not None:
                    self._drop(identity, *victim)
                    break
            else:
                return  # only pending entries left: they are weighed again when settled
