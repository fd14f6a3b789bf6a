"""Motion claims: who may move which actuators, and how motion is stopped.

Every output change happens under a claim on the actuators it moves:

* a **transient** claim is taken by one ``set``, ``restore`` or ``disarm`` for the length of its
  ramp; a second request on the same actuators waits for it (requests are applied in order);
* a **held** claim is taken by a procedure (calibration, a lock, a scan) for as long as it runs,
  or by a client's lease for a time limit; while it is held, other owners' motion on those
  actuators is refused with a ``busy`` refusal that names the holder. Its owner's own requests
  pass.

A claim carries a cooperative stop: :meth:`Claim.request_stop` is checked between steps and wakes
a claim waiting out a dwell; the write in flight always completes and is recorded. Disarm and an
emergency stop end every claim: held claims are dropped, and their next move is refused.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

from meshwarden.errors import BusyRefused, LeaseRefused, StoppedRefused

_ids = itertools.count(1)
LEASE = "lease"


@dataclass(eq=False)
class Claim:
    """Actuators held by one owner; see the module docstring."""

    owner: str
    actuators: frozenset[str]
    held: bool
    expires_at: float = float("inf")  # monotonic; a lease's time limit
    purpose: str = ""
    id: str = field(default_factory=lambda: f"claim-{next(_ids)}")
    stop_reason: str | None = None
    ended: bool = False
    _wake: asyncio.Event = field(default_factory=asyncio.Event, repr=False)
    mover: Any = field(default=None, repr=False)  # the controller, for move() and reads

    @property
    def stopping(self) -> bool:
        """True once a stop was requested (or the claim was ended): the work should wind down."""
        return self.stop_reason is not None

    def request_stop(self, reason: str) -> None:
        """Ask the motion under this claim to stop before its next step."""
        if self.stop_reason is None:
            self.stop_reason = reason
        self._wake.set()

    def resume_for_cleanup(self) -> bool:
        """After a requested stop (a cancel), let the procedure move once more to put outputs back
        where it found them; False (nothing changes) once the claim was ended by disarm or estop,
        which take the outputs over themselves."""
        if self.ended:
            return False
        self.stop_reason = None
        return True

    def check(self) -> None:
        """Raise :class:`StoppedRefused` if the claim was stopped or ended."""
        if self.stop_reason is not None:
            raise StoppedRefused(f"motion stopped: {self.stop_reason}", claim=self.id, owner=self.owner)

    async def pause_until(self, when: float) -> None:
        """Wait until monotonic time ``when``, or less if a stop is requested meanwhile."""
        delay = when - time.monotonic()
        if delay <= 0 or self.stopping:
            return
        if delay < 0.02:
            await asyncio.sleep(delay)
            return
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self._wake.wait(), delay)

    # ---------------------------------------------------------------- for procedures

    async def move(
        self,
        values: dict[str, float],
        *,
        volts: bool = False,
        journal: bool = True,
        progress: Callable[[int, int], None] | None = None,
    ) -> dict[str, dict[str, Any]]:
        """Guarded move of actuators this claim holds (logical values, or volts). ``journal``:
        record the targets (setpoints, checkpoints) or not (dither steps; see the journal policy
        in docs/architecture.md)."""
        result: dict[str, dict[str, Any]] = await self.mover.move_claimed(
            self, values, volts=volts, journal=journal, progress=progress
        )
        return result

    async def read_monitors(self, average: int = 1, integration_s: float = 1e-3) -> dict[str, dict[str, float]]:
        self.check()
        result: dict[str, dict[str, float]] = await self.mover.read_monitors(average, integration_s)
        return result

    async def read_sense(self) -> dict[str, float]:
        self.check()
        result: dict[str, float] = await self.mover.read_sense()
        return result


class ClaimRegistry:
    """The claims in force. Lives on the controller's event loop (not thread-safe)."""

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.clock = clock
        self._held: dict[str, Claim] = {}  # actuator -> held claim
        self._moving: dict[str, Claim] = {}  # actuator -> transient claim
        self._changed: asyncio.Event | None = None
        self.closing = 0  # > 0 while a disarm or an emergency stop runs: no new held claims

    def _event(self) -> asyncio.Event:
        if self._changed is None:
            self._changed = asyncio.Event()
        return self._changed

    def _notify(self) -> None:
        event = self._event()
        event.set()
        self._changed = asyncio.Event()

    def holder(self, actuator: str) -> Claim | None:
        """The held claim on ``actuator`` (expired leases are dropped here)."""
        claim = self._held.get(actuator)
        if claim is not None and claim.expires_at <= self.clock():
            self._drop(claim, "lease expired")
            return None
        return claim

    def _refuse_while_closing(self, held: bool) -> None:
        if held and self.closing:
            raise StoppedRefused("a disarm or an emergency stop is in progress: no new claims until it ends")

    def check(self, owner: str, actuators: Iterable[str]) -> None:
        """Refuse if another owner holds any of ``actuators``."""
        for actuator in actuators:
            claim = self.holder(actuator)
            if claim is not None and claim.owner != owner:
                if claim.purpose == LEASE:
                    leased = f"{actuator} is leased by '{claim.owner}'"
                    raise LeaseRefused(leased, actuator=actuator, holder=claim.owner)
                what = f" ({claim.purpose})" if claim.purpose else ""
                message = f"{actuator} is held by '{claim.owner}'{what}"
                raise BusyRefused(message, actuator=actuator, holder=claim.owner, claim=claim.id)

    async def acquire(
        self,
        owner: str,
        actuators: Iterable[str],
        *,
        held: bool,
        ttl_s: float | None = None,
        purpose: str = "",
        wait_for_motion: bool = True,
        mover: Any = None,
    ) -> Claim:
        """A new claim. Refused (busy) if another owner holds any actuator; waits for transient
        motion on them to end when ``wait_for_motion`` (a held claim for a lease does not wait)."""
        wanted = frozenset(actuators)
        while True:
            self._refuse_while_closing(held)
            self.check(owner, wanted)
            busy = [a for a in wanted if a in self._moving]
            if not busy or not wait_for_motion:
                break
            await self._event().wait()
        self._refuse_while_closing(held)
        return self._register(owner, wanted, held, ttl_s, purpose, mover)

    def hold_now(self, owner: str, actuators: Iterable[str], *, ttl_s: float, purpose: str = LEASE) -> Claim:
        """A held claim taken at once, without waiting for motion in progress (a client's lease:
        the ramp already running finishes; later motion by others is refused)."""
        wanted = frozenset(actuators)
        self._refuse_while_closing(True)
        self.check(owner, wanted)
        return self._register(owner, wanted, True, ttl_s, purpose, None)

    def release_actuators(self, owner: str, actuators: Iterable[str]) -> None:
        """Let go of ``owner``'s held claims on ``actuators``; refuses (releasing none) if
        another owner holds any of them."""
        wanted = list(actuators)
        self.check(owner, wanted)
        for actuator in wanted:
            claim = self.holder(actuator)
            if claim is not None:
                claim.actuators = claim.actuators - {actuator}
                del self._held[actuator]
                if not claim.actuators:
                    claim.ended = True
        self._notify()

    def _register(
        self, owner: str, wanted: frozenset[str], held: bool, ttl_s: float | None, purpose: str, mover: Any
    ) -> Claim:
        expires = self.clock() + ttl_s if ttl_s is not None else float("inf")
        claim = Claim(owner, wanted, held, expires, purpose, mover=mover)
        table = self._held if held else self._moving
        for actuator in wanted:
            previous = table.get(actuator)
            if held and previous is not None and previous is not claim:
                previous.actuators = previous.actuators - {actuator}  # the owner's newer lease replaces it
            table[actuator] = claim
        return claim

    def release(self, claim: Claim) -> None:
        """Let go of a claim (idempotent)."""
        self._drop(claim, None)

    def _drop(self, claim: Claim, reason: str | None) -> None:
        table = self._held if claim.held else self._moving
        for actuator in claim.actuators:
            if table.get(actuator) is claim:
                del table[actuator]
        if reason is not None:
            claim.request_stop(reason)
        claim.ended = True
        self._notify()

    def end_all(self, reason: str) -> None:
        """Disarm and emergency stop: stop all motion, drop every held claim."""
        for claim in {*self._held.values(), *self._moving.values()}:
            claim.request_stop(reason)
        for claim in set(self._held.values()):
            self._drop(claim, reason)

    async def idle(self) -> None:
        """Wait until no transient motion runs."""
        while self._moving:
            await self._event().wait()

    def owners(self, purpose: str | None = None) -> dict[str, str]:
        """Actuator -> owner of the held claim on it (only claims of ``purpose`` if given)."""
        out = {}
        for actuator in list(self._held):
            claim = self.holder(actuator)
            if claim is not None and (purpose is None or claim.purpose == purpose):
                out[actuator] = claim.owner
        return out

    def table(self) -> dict[str, dict[str, Any]]:
        """Held claims by actuator, for status."""
        out = {}
        for actuator in list(self._held):
            claim = self.holder(actuator)
            if claim is not None:
                left = claim.expires_at - self.clock()
                out[actuator] = {
                    "owner": claim.owner,
                    "claim": claim.id,
                    "purpose": claim.purpose,
                    "expires_in_s": None if left == float("inf") else round(left, 3),
                }
        return out
