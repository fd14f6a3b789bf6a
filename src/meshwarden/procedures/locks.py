"""Closed-loop locks: many at once, each holding one condition by moving one actuator, all over
one shared stream of monitor reads.

One engine task runs every lock of a controller. Each sample it moves every lock's actuator to
its centre plus its own dither ``a sin(2 pi k n / N)`` (one guarded move per lock, under the
lock's own held motion claim, not journaled, all at once) and then reads every monitor once: that
one read serves every lock. After ``N`` samples (a window) each lock demodulates its monitor
(or the fraction of its two), turns the result into an error and corrects its centre once
(:mod:`meshwarden.procedures.lock_law`). Locks sharing a monitor get clash-free distinct dither
cycles; locks with no monitor in common reuse them (:func:`~.lock_law.plan_dithers`).

The lock works in volts and uses the calibration only for units and gain: the dither and each
correction are converted from value units to volts by the table's local slope, so the requested
value's wrap modulo 2 pi in the mapping never applies; the absolute phase of the table is never
used. Near either end of the actuator's usable band (between the low volts where its phase slope
is a quarter of its top slope, and its hard limit less three dither amplitudes) the lock reports
``at_limit``; a phase actuator with 2 pi of usable range then moves to the same fringe point 2 pi
away through a guarded, journaled ramp and acquires again.

Bounds (docs/procedures.md): one sample takes at least the channel's dwell (the guard refuses a
second change sooner), so the dither's 1f line ``k / (N dt)`` stays below ``1 / (4 dwell)``
(``2k < N/2``); one correction per window gives a loop bandwidth ``K / (2 pi N dt)``, at most
``1 / (2 pi)`` of the window rate and so at most ``1 / (2 pi k)`` of the dither frequency.

Estop and disarm end the claims: every lock stops at its next move and stays stopped (arming
again does not restart it). Start, stop and every change of state are journaled (event kind
``lock``); dither steps are not.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import re
import time
from collections import deque
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from meshwarden.claims import Claim
from meshwarden.controller import Controller
from meshwarden.errors import (
    MeshwardenError,
    NotArmedRefused,
    RefusedError,
    StoppedRefused,
    UnknownTargetRefused,
)
from meshwarden.logsetup import get_logger
from meshwarden.procedures.dither import pi_step
from meshwarden.procedures.inputs import ProcedureInputError
from meshwarden.procedures.lock_band import calibrated_slope, usable_band, volts_at
from meshwarden.procedures.lock_law import (
    MAX_GAIN,
    MAX_STEP_RAD,
    Hold,
    bandwidth_of,
    demodulate_detrended,
    extremum_error,
    fraction_error,
    fraction_samples,
    gain_for,
    next_state,
    plan_dithers,
    residual_rms,
)

DEFAULT_DITHER = {"phase": 0.03, "coupler": 0.005}  # rad; power coupling
MAX_DITHER = {"phase": 0.2, "coupler": 0.05}
VALUE_PER_FRINGE_RAD = {"phase": 1.0, "coupler": 0.25}  # a coupler's kappa moves at most 1/2 per rad of 2 theta
INTEGRATION_S = 1e-4  # per monitor read
PUBLISH_INTERVAL_S = 0.2  # a lock's telemetry at most this often (and at every change of state)
KEEP_STOPPED = 200
# a fringe amplitude below FADED of the locked one (the light is gone), or a 1f slope above JUMPED of it
# (the light stepped within the window): the lock waits
FADED, JUMPED = 0.2, 3.0
NAME = re.compile(r"^[A-Za-z0-9_.:-]{1,64}$")
TWO_PI = 2.0 * math.pi


class LockRefused(RefusedError):
    """A lock that cannot start (a running lock of that name, an actuator that cannot carry it)."""

    code = "lock"


@dataclass(frozen=True)
class LockSpec:
    """What to hold, with what: see ``meshwarden lock start``."""

    name: str
    actuator: str
    monitor: str
    hold: Hold
    against: str | None = None
    dither: float | None = None  # value units (rad, or power coupling); default by kind
    bandwidth_hz: float | None = None
    integral_gain: float | None = None  # overrides the bandwidth (tests of the loop itself)


@dataclass
class Lock:
    """One running (or stopped) lock: its claim, its centre and what it reports."""

    spec: LockSpec
    kind: str
    claim: Claim
    stack: contextlib.AsyncExitStack
    centre_volts: float
    low_volts: float
    high_volts: float
    wraps: bool
    dither: float
    state: str = "acquiring"
    error: float = 0.0
    value: float = math.nan
    residual: float = 0.0
    gain: float = 0.0
    window_s: float = 0.0
    cycles: int = 1
    amplitude_volts: float = 0.0
    wraps_done: int = 0
    reason: str | None = None
    errors: deque[float] = field(default_factory=lambda: deque(maxlen=64))
    slope: float = 0.0  # a fraction lock's measured slope of x, smoothed over windows
    fringe: float = 0.0  # while locked, smoothed: hypot(slope, curvature) (max, min); P_a + P_b (fraction)
    ended: asyncio.Event = field(default_factory=asyncio.Event)
    published_at: float = -math.inf

    def describe(self) -> dict[str, Any]:
        return {
            "state": self.state,
            "actuator": self.spec.actuator,
            "monitor": self.spec.monitor,
            "hold": self.spec.hold.text(),
            "residual": self.residual,
            "value": self.value,
            "against": self.spec.against,
            "error": self.error,
            "volts": self.centre_volts,
            "dither": self.dither,
            "loop_gain": self.gain,
            "bandwidth_hz": bandwidth_of(self.gain, self.window_s) if self.window_s > 0 else None,
            "window_s": self.window_s,
            "dither_cycles": self.cycles,
            "wraps": self.wraps_done,
            "reason": self.reason,
        }


Publish = Callable[[str, dict[str, Any]], Awaitable[Any]]


class LockEngine:
    """Every lock of one controller, run by one task over a shared monitor stream."""

    def __init__(
        self,
        controller: Controller,
        publish: Publish | None = None,
        *,
        integration_s: float = INTEGRATION_S,
        on_sample: Callable[[int], None] | None = None,
    ) -> None:
        self.controller = controller
        self.publish = publish
        self.integration_s = integration_s
        # called after each sample's moves with the sample's index in its window (at 0 every dither is 0):
        # tests and the bench observe the chip there
        self.on_sample = on_sample
        self.locks: dict[str, Lock] = {}
        self.windows = 0
        self.samples = 0
        self.sample_period_s = 0.0
        self._task: asyncio.Task[None] | None = None
        self._starting: set[str] = set()  # names and actuators of starts still waiting for their claim
        self._background: set[asyncio.Task[Any]] = set()
        self.log = get_logger(component="locks")

    # ------------------------------------------------------------------ requests

    def active(self) -> list[Lock]:
        return [lock for lock in self.locks.values() if not lock.ended.is_set()]

    def table(self) -> dict[str, dict[str, Any]]:
        """Every lock, running or stopped, as ``lock list --json`` shows it (with more detail)."""
        return {name: lock.describe() for name, lock in self.locks.items()}

    def _check(self, spec: LockSpec) -> str:
        if not isinstance(spec.name, str) or not NAME.match(spec.name):
            raise ProcedureInputError(f"lock name must be 1-64 letters, digits or _.:-, got {spec.name!r}")
        running = self.locks.get(spec.name)
        if (running is not None and not running.ended.is_set()) or spec.name in self._starting:
            raise LockRefused(f"lock '{spec.name}' is running; stop it first", lock=spec.name)
        if spec.actuator in self._starting:
            raise LockRefused(f"{spec.actuator} is being taken by another lock", actuator=spec.actuator)
        if spec.actuator not in self.controller.actuators:
            raise UnknownTargetRefused(f"unknown actuator '{spec.actuator}'", target=spec.actuator)
        monitors = {m.id for m in self.controller.config.chip.monitors}
        for role, monitor in (("monitor", spec.monitor), ("against", spec.against)):
            if monitor is not None and monitor not in monitors:
                raise UnknownTargetRefused(f"unknown {role} monitor '{monitor}'", target=monitor)
        if spec.hold.kind == "fraction":
            if spec.against is None:
                raise ProcedureInputError("hold fraction=X needs --against: the second monitor of the fraction")
            if spec.against == spec.monitor:
                raise ProcedureInputError("the fraction's two monitors must differ")
        elif spec.against is not None:
            raise ProcedureInputError(f"hold {spec.hold.kind} takes one monitor; --against is for fraction=X")
        for other in self.active():
            if other.spec.actuator == spec.actuator:
                raise LockRefused(f"{spec.actuator} is already held by lock '{other.spec.name}'", lock=other.spec.name)
        kind = self.controller.actuators[spec.actuator].config.kind
        dither = DEFAULT_DITHER[kind] if spec.dither is None else spec.dither
        if not (isinstance(dither, int | float) and math.isfinite(dither) and 0.0 < dither <= MAX_DITHER[kind]):
            raise ProcedureInputError(
                f"dither must be above 0 and at most {MAX_DITHER[kind]:g} for a {kind}, got {dither}"
            )
        if spec.integral_gain is not None and not 0.0 < spec.integral_gain <= 2 * MAX_GAIN:
            raise ProcedureInputError(f"integral_gain must be above 0 and at most {2 * MAX_GAIN:g}")
        if spec.bandwidth_hz is not None:
            dwell = self.controller.actuators[spec.actuator].limit.dwell_s
            sample_s = max(self.sample_period_s, dwell)
            window, _ = plan_dithers([*self._monitor_sets(self.active()), self._monitors_of(spec)])
            gain_for(spec.bandwidth_hz, window * sample_s)  # refuses a bandwidth the dither cannot carry
        if not self.controller.armed:
            raise NotArmedRefused("a lock moves outputs: arm first")
        return kind

    async def start(self, spec: LockSpec, client: str = "local") -> dict[str, Any]:
        """Check ``spec``, hold its actuator and add it to the running locks (refused whole, or started)."""
        kind = self._check(spec)
        reserved = {spec.name, spec.actuator}
        self._starting |= reserved
        try:
            return await self._start(spec, kind, client)
        finally:
            self._starting -= reserved

    async def _start(self, spec: LockSpec, kind: str, client: str) -> dict[str, Any]:
        state = self.controller.actuators[spec.actuator]
        amap = state.map
        low, high = usable_band(amap, kind)
        margin = (
            3.0
            * (DEFAULT_DITHER[kind] if spec.dither is None else spec.dither)
            / max(calibrated_slope(amap, high), 1e-9)
        )
        high = min(high, amap.top_volts - margin)
        if not high > low:
            raise LockRefused(f"{spec.actuator} has no usable range to dither in (its table or limit is too short)")
        wraps = kind == "phase" and amap.value_at(high) - amap.value_at(low) > TWO_PI + 0.2
        stack = contextlib.AsyncExitStack()
        claim = await stack.enter_async_context(
            self.controller.claim([spec.actuator], owner=f"lock:{spec.name}", purpose="lock")
        )
        try:
            volts = float(self.controller.describe(spec.actuator)["volts"])
            centre = volts
            if not low <= volts <= high:  # into the band's middle first (room both ways): a guarded, journaled ramp
                middle = volts_at(amap, 0.5 * (amap.value_at(low) + amap.value_at(high)), low, high)
                centre = middle if middle is not None else 0.5 * (low + high)
            if centre != volts:
                await claim.move({spec.actuator: centre}, volts=True, journal=True)
        except BaseException:
            await stack.aclose()
            raise
        dither = DEFAULT_DITHER[kind] if spec.dither is None else float(spec.dither)
        lock = Lock(spec, kind, claim, stack, centre, low, high, wraps, dither)
        lock.value = amap.value_at(centre)
        self.locks.pop(spec.name, None)
        self.locks[spec.name] = lock
        while len(self.locks) > KEEP_STOPPED + len(self.active()):
            oldest = next(name for name, one in self.locks.items() if one.ended.is_set())
            del self.locks[oldest]
        self._journal(lock, "start", client=client, dither=dither, band_volts=[round(low, 3), round(high, 3)])
        self._announce(lock, force=True)
        if self._task is None or self._task.done():
            self._task = asyncio.get_running_loop().create_task(self._run())
        return lock.describe()

    async def stop(self, name: str | None = None, reason: str = "stopped by request") -> list[str]:
        """Stop one lock (or every running one, ``name`` None); returns the names stopped."""
        if name is not None:
            lock = self.locks.get(name)
            if lock is None:
                raise UnknownTargetRefused(f"no lock named '{name}'", lock=name)
            targets = [] if lock.ended.is_set() else [lock]
        else:
            targets = self.active()
        for lock in targets:
            lock.reason = reason
            lock.claim.request_stop(reason)
        if self._task is None or self._task.done():
            for lock in targets:
                await self._end(lock, reason)
        for lock in targets:
            await lock.ended.wait()
        return [lock.spec.name for lock in targets]

    async def close(self) -> None:
        """Stop every lock and the engine (daemon shutdown)."""
        await self.stop(None, "daemon stopping")
        if self._task is not None:
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
        for task in list(self._background):
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task

    # ------------------------------------------------------------------ the engine

    @staticmethod
    def _monitors_of(spec: LockSpec) -> frozenset[str]:
        return frozenset(m for m in (spec.monitor, spec.against) if m is not None)

    def _monitor_sets(self, locks: list[Lock]) -> list[frozenset[str]]:
        return [self._monitors_of(lock.spec) for lock in locks]

    async def _run(self) -> None:
        try:
            while self.active():
                await self._window(self.active())
        except Exception as exc:  # a bug must not leave claims held: stop everything, say why
            self.log.error("lock engine failed", error=repr(exc))
            for lock in self.active():
                await self._end(lock, f"lock engine failed: {exc}")

    async def _window(self, locks: list[Lock]) -> None:
        window, cycles = plan_dithers(self._monitor_sets(locks))
        for lock, k in zip(locks, cycles, strict=True):
            lock.cycles = k
            slope = calibrated_slope(self.controller.actuators[lock.spec.actuator].map, lock.centre_volts)
            step_limit = self.controller.actuators[lock.spec.actuator].limit.step_limit_volts
            lock.amplitude_volts = min(lock.dither / max(slope, 1e-9), step_limit / 2.0)
        phase = 2.0 * math.pi * np.arange(window) / window
        readings: list[dict[str, dict[str, float]]] = []
        started = time.monotonic()
        for n in range(window):
            live = [lock for lock in locks if not lock.ended.is_set()]
            if not live:
                return
            moves = [
                lock.claim.move(
                    {lock.spec.actuator: lock.centre_volts + lock.amplitude_volts * math.sin(lock.cycles * phase[n])},
                    volts=True,
                    journal=False,
                )
                for lock in live
            ]
            outcomes = await asyncio.gather(*moves, return_exceptions=True)
            for lock, outcome in zip(live, outcomes, strict=True):
                if isinstance(outcome, BaseException):
                    await self._end(lock, _why(outcome, lock))
            if self.on_sample is not None:
                self.on_sample(n)
            try:
                readings.append(await self.controller.read_monitors(1, self.integration_s))
            except MeshwardenError as exc:
                self.log.warning("lock window skipped: monitors unreadable", error=exc.message)
                return
        elapsed = time.monotonic() - started
        self.samples += window
        self.windows += 1
        period = elapsed / window
        self.sample_period_s = period if self.sample_period_s == 0 else 0.8 * self.sample_period_s + 0.2 * period
        for lock in locks:
            if not lock.ended.is_set():
                await self._correct(lock, readings, elapsed)

    async def _correct(self, lock: Lock, readings: list[dict[str, dict[str, float]]], window_s: float) -> None:
        spec, amap = lock.spec, self.controller.actuators[lock.spec.actuator].map
        a = [lock.dither]
        primary = [r[spec.monitor]["watts"] for r in readings]
        try:
            if spec.hold.extremum:
                result = demodulate_detrended(primary, [lock.cycles], a)
                error = (
                    extremum_error(result.slope[0], result.curvature[0], spec.hold.kind, lock.fringe)
                    * VALUE_PER_FRINGE_RAD[lock.kind]
                )
                error_slope = 1.0
            else:
                assert spec.against is not None and spec.hold.fraction is not None
                x = fraction_samples(primary, [r[spec.against]["watts"] for r in readings])
                result = demodulate_detrended(x, [lock.cycles], a)
                lock.slope = result.slope[0] if lock.slope == 0.0 else 0.7 * lock.slope + 0.3 * result.slope[0]
                error, error_slope = fraction_error(
                    result.mean, lock.slope, result.curvature[0], spec.hold.fraction, lock.dither
                )
        except ProcedureInputError as exc:
            self.log.warning("lock window unusable", lock=spec.name, error=exc.message)
            return
        lock.window_s = window_s
        jumped = False
        if spec.hold.extremum:  # the fringe's amplitude: large at an extremum, steady along it
            amplitude = math.hypot(result.slope[0], result.curvature[0])
            # |s| <= the fringe amplitude on any fringe; the 2f estimate is too noisy to judge by
            jumped = lock.fringe > 0.0 and abs(result.slope[0]) > JUMPED * lock.fringe
        else:  # x's curvature is small on the slope and its estimate noisy: the light of both taps
            assert spec.against is not None
            amplitude = float(np.mean(primary) + np.mean([r[spec.against]["watts"] for r in readings]))
        if lock.fringe > 0.0 and (amplitude < FADED * lock.fringe or jumped):
            # the light is gone (or the monitor blind), or it changed within the window (a step is no
            # fringe): hold still rather than chase it
            lock.error = error
            lock.errors.clear()  # locked again only after LOCK_WINDOWS good windows from here
            self._set_state(lock, "lost")
            return
        if lock.state == "locked" and (lock.fringe == 0.0 or 0.5 * lock.fringe <= amplitude <= 2.0 * lock.fringe):
            # learnt at the lock only, and never from a window that looks unlike the fringe so far
            lock.fringe = amplitude if lock.fringe == 0.0 else 0.9 * lock.fringe + 0.1 * amplitude
        if spec.integral_gain is not None:
            lock.gain = spec.integral_gain
        else:
            try:
                lock.gain = gain_for(spec.bandwidth_hz, window_s)
            except ProcedureInputError:
                lock.gain = MAX_GAIN  # more locks made the window longer than the asked bandwidth allows
        max_step = MAX_STEP_RAD * VALUE_PER_FRINGE_RAD[lock.kind]
        step_value = pi_step(error, error_slope, integral_gain=lock.gain, max_step=max_step)
        slope = calibrated_slope(amap, lock.centre_volts)
        centre = lock.centre_volts + step_value / max(slope, 1e-9)
        lock.error = error
        lock.errors.append(error)
        lock.residual = residual_rms(lock.errors)
        state = next_state(lock.state if lock.state != "at_limit" else "acquiring", error, lock.errors, spec.hold.kind)
        if centre < lock.low_volts or centre > lock.high_volts:
            await self._at_limit(lock, centre)
            return
        lock.centre_volts = centre
        lock.value = amap.value_at(centre)
        self._set_state(lock, state)

    async def _at_limit(self, lock: Lock, wanted_volts: float) -> None:
        """The correction would leave the usable band: report, and re-wrap a phase by 2 pi if it can."""
        amap = self.controller.actuators[lock.spec.actuator].map
        edge = lock.high_volts if wanted_volts > lock.high_volts else lock.low_volts
        self._set_state(lock, "at_limit")
        if lock.wraps:
            value = amap.value_at(edge)
            target_value = value - TWO_PI if edge == lock.high_volts else value + TWO_PI
            target = volts_at(amap, target_value, lock.low_volts, lock.high_volts)
            if target is not None:
                self._journal(lock, "wrap", from_volts=round(edge, 4), to_volts=round(target, 4))
                try:
                    await lock.claim.move({lock.spec.actuator: target}, volts=True, journal=True)
                except MeshwardenError as exc:
                    await self._end(lock, _why(exc, lock))
                    return
                lock.centre_volts = target
                lock.value = amap.value_at(target)
                lock.wraps_done += 1
                lock.errors.clear()
                self._set_state(lock, "acquiring")
                return
        lock.centre_volts = edge
        lock.value = amap.value_at(edge)

    async def _end(self, lock: Lock, reason: str) -> None:
        if lock.ended.is_set():
            return
        lock.reason = lock.reason or reason
        lock.state = "stopped"
        lock.ended.set()
        with contextlib.suppress(Exception):
            await lock.stack.aclose()
        self._journal(lock, "stopped", reason=lock.reason)
        self._announce(lock, force=True)

    def _set_state(self, lock: Lock, state: str) -> None:
        changed = state != lock.state
        if changed:
            lock.state = state
            self._journal(lock, state, error=round(lock.error, 6), residual=round(lock.residual, 6))
        self._announce(lock, force=changed)

    def _journal(self, lock: Lock, what: str, client: str | None = None, **detail: Any) -> None:
        self.controller.journal.event(
            "lock",
            actuator=lock.spec.actuator,
            client=client or f"lock:{lock.spec.name}",
            lock=lock.spec.name,
            what=what,
            state=lock.state,
            hold=lock.spec.hold.text(),
            monitor=lock.spec.monitor,
            against=lock.spec.against,
            **detail,
        )

    def _announce(self, lock: Lock, *, force: bool) -> None:
        if self.publish is None:
            return
        now = time.monotonic()
        if not force and now - lock.published_at < PUBLISH_INTERVAL_S:
            return
        lock.published_at = now
        body = {"lock": lock.spec.name, **lock.describe()}
        task = asyncio.get_running_loop().create_task(_quiet(self.publish("lock", body)))
        self._background.add(task)
        task.add_done_callback(self._background.discard)


async def _quiet(work: Awaitable[Any]) -> None:
    with contextlib.suppress(Exception):
        await work


def _why(exc: BaseException, lock: Lock) -> str:
    if isinstance(exc, StoppedRefused):
        return lock.claim.stop_reason or exc.message
    if isinstance(exc, MeshwardenError):
        return f"{exc.code}: {exc.message}"
    return f"error: {exc!r}"
