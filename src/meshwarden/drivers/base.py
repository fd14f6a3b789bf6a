"""The board driver interface: public methods own the policy, a backend only the raw exchange.

Every public method checks its arguments against the board's configuration (channel ranges, code
range), logs with the board id bound, verifies what the board says it did, and counts link
errors; a backend implements three hooks - open the link, close it, exchange one request for
one reply - so no backend can skip a check. When the share of failed attempts over the recent
transactions passes the board's ``error_rate_limit``, the board is declared faulted and every
further call raises :class:`~meshwarden.errors.BoardFaulted` until :meth:`BoardDriver.recover` -
except :meth:`BoardDriver.emergency_zero`, which an emergency stop sends to every board, faulted
or not.

Two records are kept here because every exchange passes through here, in the order the board
executed it (the rack gives each board one thread):

* **What the board was seen to hold** (:meth:`BoardDriver.outputs_seen`): updated only from a
  verified acknowledgement (a write whose latched codes match, a read, a confirmed zero). Any
  write that does not end in a verified acknowledgement - timeout, NAK, readback mismatch, link
  loss, an emergency abort - puts the whole board in *doubt* until a full read succeeds. Motion
  plans only from codes seen, never from what it asked for.
* **The output ceiling** (:meth:`BoardDriver.set_ceiling`): each channel's hard-limit code,
  given by the rack from the configuration. :meth:`BoardDriver.write_codes` refuses a code above
  it (defence in depth behind the guard), unless the channel was seen holding at least that code
  (a ramp down from an output found above a lowered limit). Until a ceiling is set, every code
  above zero is refused.
"""

from __future__ import annotations

import threading
import time
from abc import ABC, abstractmethod
from collections import deque
from dataclasses import dataclass

from meshwarden.config.model import BoardConfig
from meshwarden.errors import BoardFaulted, LimitRefused, MeshwardenError, ProtocolError, ReadbackError
from meshwarden.logsetup import get_logger
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import StatusFlag, WatchdogAction

ERROR_WINDOW = 50
MIN_SAMPLES = 20


@dataclass(frozen=True)
class BoardIdentity:
    model: str
    firmware: tuple[int, int, int]
    outputs: int
    monitor_inputs: int
    dac_bits: int
    adc_bits: int
    full_scale_volts: float
    adc_full_scale_volts: float
    serial: int
    boot_count: int
    monitor_gains_ohms: tuple[int, ...]


@dataclass(frozen=True)
class BoardStatus:
    watchdog_tripped: bool
    output_fault: bool
    power_on: bool
    ramping: bool
    boot_count: int
    uptime_s: float
    watchdog_remaining_s: float
    crc_errors: int
    framing_errors: int
    interlock_open: bool = False  # the board's interlock contact is open now (a live level)


@dataclass(frozen=True)
class HeartbeatInfo:
    uptime_s: float
    boot_count: int


class BoardDriver(ABC):
    """One board. Not thread-safe by design: the rack gives each board its own worker thread."""

    def __init__(self, config: BoardConfig) -> None:
        self.config = config
        self.log = get_logger(board=config.id)
        self.max_code = (1 << config.dac_bits) - 1
        self._attempts: deque[bool] = deque(maxlen=ERROR_WINDOW)
        self.faulted = False
        self.abort = threading.Event()  # set by an emergency stop: give up retries at once
        self._seen_lock = threading.Lock()
        self._codes = [0] * config.outputs  # last codes seen latched (valid only without doubt)
        self._doubt: str | None = "not read yet"
        self._written_at = [-float("inf")] * config.outputs  # monotonic time of each channel's last ack
        self._ceiling = (0,) * config.outputs

    # ------------------------------------------------------------------ what the board holds

    def set_ceiling(self, codes: tuple[int, ...]) -> None:
        """Each output's hard-limit code; :meth:`write_codes` refuses anything above it."""
        if len(codes) != self.config.outputs or any(not 0 <= c <= self.max_code for c in codes):
            raise MeshwardenError(
                f"board {self.config.id}: a ceiling needs {self.config.outputs} codes in 0..{self.max_code}"
            )
        self._ceiling = tuple(codes)

    @property
    def ceiling(self) -> tuple[int, ...]:
        return self._ceiling

    def outputs_seen(self) -> tuple[tuple[int, ...], str | None]:
        """The codes last seen latched on every output, and the reason they are in doubt (None
        when they are certain: the last write or read of this board was verified)."""
        with self._seen_lock:
            return tuple(self._codes), self._doubt

    def written_at(self, channel: int) -> float:
        """Monotonic time of the last verified write that changed ``channel`` (-inf if none)."""
        return self._written_at[channel]

    def _seen(self, first: int, codes: tuple[int, ...], whole: bool = False) -> None:
        with self._seen_lock:
            now = time.monotonic()
            for offset, code in enumerate(codes):
                if self._codes[first + offset] != code:
                    self._written_at[first + offset] = now
                self._codes[first + offset] = code
            if whole:
                self._doubt = None

    def _doubted(self, why: str) -> None:
        with self._seen_lock:
            self._doubt = why

    # ------------------------------------------------------------------ backend hooks

    @abstractmethod
    def _open_link(self) -> None:
        """Open the link to the board."""

    @abstractmethod
    def _close_link(self) -> None:
        """Close the link (idempotent)."""

    @abstractmethod
    def _exchange(self, request: m.Message) -> m.Message:
        """Send one request and return the board's reply (an acknowledgement payload or a Nak);
        retries, timeouts and resynchronisation are the backend's, errors are MeshwardenErrors."""

    # ------------------------------------------------------------------ health

    def note_attempt(self, ok: bool) -> None:
        """Backends report each attempt; too many failures fault the board."""
        self._attempts.append(ok)
        if len(self._attempts) >= MIN_SAMPLES and not self.faulted:
            rate = self._attempts.count(False) / len(self._attempts)
            if rate > self.config.error_rate_limit:
                self.faulted = True
                self.log.error("board faulted", error_rate=round(rate, 3), limit=self.config.error_rate_limit)

    @property
    def error_rate(self) -> float:
        return self._attempts.count(False) / len(self._attempts) if self._attempts else 0.0

    def recover(self) -> None:
        """Forget the error history (after the operator has fixed the link)."""
        self._attempts.clear()
        self.faulted = False

    def _call(self, request: m.Message, expected: type[m.Message], force: bool = False) -> m.Message:
        if self.faulted and not force:
            raise BoardFaulted(
                f"board {self.config.id} is faulted (link error rate above {self.config.error_rate_limit:g})",
                board=self.config.id,
            )
        reply = self._exchange(request)
        if isinstance(reply, m.Nak):
            from meshwarden.errors import BoardNakError

            raise BoardNakError(
                f"board {self.config.id}: {reply.describe()}",
                board=self.config.id,
                reason=reply.reason,
                detail=reply.detail,
            )
        if not isinstance(reply, expected):
            raise ProtocolError(
                f"board {self.config.id}: expected {expected.__name__}, got {type(reply).__name__}",
                board=self.config.id,
            )
        return reply

    def _check_range(self, first: int, count: int, limit: int, what: str) -> None:
        if count < 1 or first < 0 or first + count > limit:
            raise MeshwardenError(
                f"board {self.config.id}: {what} {first}..{first + count - 1} out of 0..{limit - 1}",
                board=self.config.id,
            )

    # ------------------------------------------------------------------ life cycle

    def open(self) -> None:
        self._doubted("link opened, outputs not read yet")
        self._open_link()
        self.log.info("link open", url=self.config.url)

    def close(self) -> None:
        self._close_link()

    # ------------------------------------------------------------------ commands

    def identify(self) -> BoardIdentity:
        r = self._call(m.Identify(), m.IdentifyReply)
        assert isinstance(r, m.IdentifyReply)
        return BoardIdentity(
            r.model,
            r.firmware,
            r.outputs,
            r.monitor_inputs,
            r.dac_bits,
            r.adc_bits,
            r.full_scale_mv / 1000.0,
            r.adc_full_scale_uv / 1e6,
            r.serial,
            r.boot_count,
            r.monitor_gains_ohms,
        )

    def write_codes(self, first: int, codes: tuple[int, ...]) -> tuple[int, ...]:
        """Latch ``codes`` at outputs ``first``...; the codes the board reports latched must match.
        Nothing is sent if a code is above its channel's ceiling (and not a move down from a code
        seen higher). A write that is sent but not verified puts the board in doubt."""
        self._check_range(first, len(codes), self.config.outputs, "outputs")
        codes = tuple(codes)
        with self._seen_lock:
            held = list(self._codes) if self._doubt is None else None
        for offset, code in enumerate(codes):
            if not isinstance(code, int) or not 0 <= code <= self.max_code:
                raise MeshwardenError(f"board {self.config.id}: code {code!r} outside 0..{self.max_code}")
            ch = first + offset
            if code > self._ceiling[ch] and (held is None or code > held[ch]):
                raise LimitRefused(
                    f"board {self.config.id}: code {code} on output {ch} is above its ceiling {self._ceiling[ch]}",
                    board=self.config.id,
                    channel=ch,
                )
        try:
            r = self._call(m.WriteOutputs(first, codes), m.OutputsReply)
        except BaseException as exc:
            self._doubted(f"write to outputs {first}..{first + len(codes) - 1} not acknowledged: {exc}")
            raise
        assert isinstance(r, m.OutputsReply)
        if r.first != first or tuple(r.values) != codes:
            self._doubted("the board latched other codes than written")
            raise ReadbackError(
                f"board {self.config.id}: wrote {list(codes)} at {first}, board latched {list(r.values)} at {r.first}",
                board=self.config.id,
            )
        self._seen(first, codes)
        return tuple(r.values)

    def read_codes(self, first: int, count: int) -> tuple[int, ...]:
        """The latched codes of outputs ``first``...; a read of every output ends any doubt."""
        self._check_range(first, count, self.config.outputs, "outputs")
        r = self._call(m.ReadOutputs(first, count), m.OutputsReply)
        assert isinstance(r, m.OutputsReply)
        values = tuple(r.values)
        if r.first != first or len(values) != count:
            raise ProtocolError(
                f"board {self.config.id}: asked for outputs {first}+{count}, got {r.first}+{len(values)}"
            )
        whole = first == 0 and count == self.config.outputs
        with self._seen_lock:
            certain = self._doubt is None
        if whole or certain:
            self._seen(first, values, whole=whole)
        return values

    def read_sense_volts(self, first: int, count: int) -> tuple[float, ...]:
        self._check_range(first, count, self.config.outputs, "outputs")
        r = self._call(m.ReadSense(first, count), m.SenseReply)
        assert isinstance(r, m.SenseReply)
        return tuple(v * 1e-6 for v in r.values)

    def read_monitor_counts(self, first: int, count: int, integration_s: float) -> tuple[int, ...]:
        self._check_range(first, count, self.config.monitor_inputs, "monitor inputs")
        r = self._call(m.ReadMonitors(first, count, max(1, round(integration_s * 1e6))), m.MonitorsReply)
        assert isinstance(r, m.MonitorsReply)
        return tuple(r.counts)

    def set_monitor_gains(self, first: int, gain_indices: tuple[int, ...]) -> None:
        self._check_range(first, len(gain_indices), self.config.monitor_inputs, "monitor inputs")
        self._call(m.SetMonitorGain(first, tuple(gain_indices)), m.GainReply)

    def configure_watchdog(self, timeout_s: float, action: str) -> None:
        code = {"hold": WatchdogAction.HOLD, "ramp_to_zero": WatchdogAction.RAMP_TO_ZERO, "off": WatchdogAction.OFF}
        self._call(m.ConfigureWatchdog(round(timeout_s * 1000), code[action]), m.WatchdogReply)

    def heartbeat(self) -> HeartbeatInfo:
        r = self._call(m.Heartbeat(), m.HeartbeatReply)
        assert isinstance(r, m.HeartbeatReply)
        return HeartbeatInfo(r.uptime_ms / 1000.0, r.boot_count)

    def zero_all(self) -> None:
        self._zero(force=False)

    def emergency_zero(self) -> None:
        """Zero every output even on a board faulted for its link error rate: an emergency stop
        tries every board it can (its retries are never given up for an abort)."""
        self._zero(force=True)

    def _zero(self, force: bool) -> None:
        try:
            self._call(m.ZeroAll(), m.Ack, force=force)
        except BaseException as exc:
            self._doubted(f"zero all not acknowledged: {exc}")
            raise
        self._seen(0, (0,) * self.config.outputs, whole=True)

    def status(self) -> BoardStatus:
        r = self._call(m.Status(), m.StatusReply)
        assert isinstance(r, m.StatusReply)
        flags = StatusFlag(r.flags)
        return BoardStatus(
            bool(flags & StatusFlag.WATCHDOG_TRIPPED),
            bool(flags & StatusFlag.OUTPUT_FAULT),
            bool(flags & StatusFlag.POWER_ON),
            bool(flags & StatusFlag.RAMPING),
            r.boot_count,
            r.uptime_ms / 1000.0,
            r.watchdog_remaining_ms / 1000.0,
            r.crc_errors,
            r.framing_errors,
            bool(flags & StatusFlag.INTERLOCK_OPEN),
        )

    def interlock_open(self) -> bool:
        """Whether the board's interlock contact is open now (read from its status)."""
        return self.status().interlock_open

    def reset(self) -> None:
        self._doubted("board reset")
        self._call(m.Reset(), m.Ack)

    def clear_faults(self) -> None:
        self._call(m.ClearFaults(), m.Ack)
