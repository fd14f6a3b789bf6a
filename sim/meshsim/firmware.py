"""The firmware of one simulated driver board: bytes in, bytes out, through the shared codec.

It behaves as the protocol (docs/protocol.md) says a board must, including the unhappy paths:
a bad CRC or garbage is answered with a negative acknowledgement and the next good frame is
served; a repeated sequence number gets the stored reply without executing twice; a reset or a
brown-out zeroes the outputs, bumps the boot counter and leaves the link silent while it boots;
the watchdog holds or ramps the outputs to zero when heartbeats stop.

The board's electrical side is reached through :class:`BoardWiring` callbacks (set the voltage on
actuators, read tap powers), so the firmware knows nothing of MEMS or optics.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from meshsim.params import BoardFirmware as FirmwareParams
from meshsim.params import Detectors, Laser
from meshsim.physics.detectors import detect, responsivity_a_per_w
from meshsim.scenario import BoardSpec
from meshwarden.errors import ChecksumError, ProtocolError
from meshwarden.protocol import Frame, FrameDecoder, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason, StatusFlag, WatchdogAction

BOOT_TIME_S = 0.05
MAX_INTEGRATION_US = 1_000_000


@dataclass
class BoardWiring:
    """What hangs off the board's terminals, as callbacks into the simulated chip."""

    apply_volts: Callable[[NDArray[np.int64], NDArray[np.float64], float], None]
    tap_powers_w: Callable[[float], NDArray[np.float64]]
    channel_actuator: NDArray[np.int64]  # actuator index per output channel, -1 if unwired
    input_monitor: NDArray[np.int64]  # monitor index per monitor input, -1 if unwired


@dataclass
class ChannelFaults:
    """Injected faults of the board's own electronics."""

    dead: set[int] = field(default_factory=set)
    short: dict[int, float] = field(default_factory=dict)  # channel -> sag fraction
    open_wire: set[int] = field(default_factory=set)  # channel whose actuator wire is open
    dead_inputs: set[int] = field(default_factory=set)
    saturated_inputs: set[int] = field(default_factory=set)
    noisy_inputs: dict[int, float] = field(default_factory=dict)  # input -> extra noise A rms


class SimBoard:
    """One board's firmware state machine."""

    def __init__(
        self,
        spec: BoardSpec,
        serial: int,
        wiring: BoardWiring,
        firmware: FirmwareParams,
        detectors: Detectors,
        laser: Laser,
        rng: np.random.Generator,
    ) -> None:
        self.spec = spec
        self.serial = serial
        self.wiring = wiring
        self.params = firmware
        self.detectors = detectors
        self.responsivity = responsivity_a_per_w(detectors.quantum_efficiency, laser.wavelength_m)
        self.rng = rng
        self.faults = ChannelFaults()
        self.interlock_open = False  # the interlock contact wired to this board (set by the rack)
        self.boot_count = 0
        self.writes_executed = 0  # inspection: how many write commands really ran
        # inspection: (sim time, "write" | "zero" | "boot" | "ramped_to_zero", first channel, codes)
        self.write_log: deque[tuple[float, str, int, tuple[int, ...]]] = deque(maxlen=200_000)
        self.crc_errors = 0
        self.framing_errors = 0
        self.decoder = FrameDecoder()
        self.lsb_volts = spec.full_scale_volts / (1 << spec.dac_bits)
        self._boot(0.0)
        self.booted_at = -BOOT_TIME_S  # the rack was powered before the simulation began

    # ------------------------------------------------------------------ life cycle

    def _boot(self, now: float) -> None:
        """Power-on state: outputs zero, watchdog off, power-on flag set, boot counter + 1."""
        self.codes = np.zeros(self.spec.outputs, dtype=np.int64)
        self.gain_index = np.zeros(self.spec.monitor_inputs, dtype=np.int64)
        self.watchdog_ms = 0
        self.watchdog_action = WatchdogAction.OFF
        self.last_valid = now
        self.tripped_at: float | None = None
        self.ramp_from = np.zeros(self.spec.outputs)
        self.flags = StatusFlag.POWER_ON
        self.boot_count += 1
        self.booted_at = now
        self.write_log.append((now, "boot", 0, ()))
        self.last_request: tuple[int, int, bytes] | None = None
        self.last_reply = b""
        self.decoder.reset()
        self._drive(now)

    def power_cycle(self, now: float) -> None:
        """A reset or brown-out: everything a boot does, and the link is deaf while it boots."""
        self._boot(now)

    # ------------------------------------------------------------------ electrical side

    def commanded_volts(self, now: float) -> NDArray[np.float64]:
        """The latched codes in volts, lowered by a watchdog ramp in progress."""
        volts = self.codes * self.lsb_volts
        if self.tripped_at is not None and self.watchdog_action == WatchdogAction.RAMP_TO_ZERO:
            ramped = np.maximum(self.ramp_from - self.params.watchdog_ramp_volts_per_s * (now - self.tripped_at), 0.0)
            volts = np.minimum(volts, ramped)
        return np.asarray(volts, dtype=float)

    def output_volts(self, now: float) -> NDArray[np.float64]:
        """What the high-voltage stage puts out on each channel now (with its own faults)."""
        volts = self.commanded_volts(now)
        for ch in self.faults.dead:
            volts[ch] = 0.0
        for ch, sag in self.faults.short.items():
            volts[ch] *= sag
        return volts

    def _drive(self, now: float) -> None:
        """Push the current outputs to the wired actuators (an open wire leaves its actuator at 0 V)."""
        volts = self.output_volts(now)
        for ch in self.faults.open_wire:
            volts[ch] = 0.0
        wired = self.wiring.channel_actuator >= 0
        self.wiring.apply_volts(self.wiring.channel_actuator[wired], volts[wired], now)

    def tick(self, now: float) -> None:
        """Let time act: the watchdog trips, a ramp to zero progresses."""
        if self.watchdog_action != WatchdogAction.OFF and self.tripped_at is None:
            deadline = self.last_valid + self.watchdog_ms / 1000.0
            if now >= deadline:
                self.tripped_at = deadline
                self.ramp_from = np.asarray(self.codes * self.lsb_volts, dtype=float)
                self.flags |= StatusFlag.WATCHDOG_TRIPPED
                if self.watchdog_action == WatchdogAction.RAMP_TO_ZERO:
                    self.flags |= StatusFlag.RAMPING
        if self.tripped_at is not None and self.watchdog_action == WatchdogAction.RAMP_TO_ZERO:
            volts = self.commanded_volts(now)
            if self.flags & StatusFlag.RAMPING:
                if not volts.any():
                    self.codes[:] = 0
                    self.flags &= ~StatusFlag.RAMPING
                    self.write_log.append((now, "ramped_to_zero", 0, ()))
                self._drive(now)

    # ------------------------------------------------------------------ bytes

    def receive(self, data: bytes, now: float) -> list[tuple[float, bytes]]:
        """Consume bytes from the link; return replies as (simulated time ready, bytes)."""
        self.tick(now)
        replies: list[tuple[float, bytes]] = []
        if now < self.booted_at + BOOT_TIME_S:
            return replies  # still booting: the UART is not listening yet
        for item in self.decoder.feed(data):
            if isinstance(item, ProtocolError):
                if isinstance(item, ChecksumError):
                    self.crc_errors += 1
                    reason = NakReason.CHECKSUM
                else:
                    self.framing_errors += 1
                    reason = NakReason.FRAMING
                replies.append((now, self._frame(0, m.NAK_COMMAND, m.Nak(0, reason).pack())))
                continue
            if item.address != self.spec.address:
                continue  # for another board on a shared line: stay silent
            self.last_valid = now
            key = (item.seq, item.command, item.payload)
            if key == self.last_request:
                replies.append((now, self.last_reply))  # a retransmission: answer again, do not execute
                continue
            ready, reply = self._execute(item, now)
            self.last_request = key
            self.last_reply = reply
            replies.append((ready, reply))
            if item.command == m.Command.RESET:
                self.power_cycle(now)
                break
        return replies

    def _frame(self, seq: int, command: int, payload: bytes) -> bytes:
        return encode_frame(Frame(self.spec.address, seq, command, payload))

    def _nak(self, frame: Frame, reason: NakReason, detail: int = 0) -> bytes:
        return self._frame(frame.seq, m.NAK_COMMAND, m.Nak(frame.command, reason, detail).pack())

    def _execute(self, frame: Frame, now: float) -> tuple[float, bytes]:
        try:
            request = m.decode_request(frame.command, frame.payload)
        except ProtocolError:
            if frame.command not in m.REQUESTS:
                return now, self._nak(frame, NakReason.UNKNOWN_COMMAND)
            return now, self._nak(frame, NakReason.BAD_LENGTH, len(frame.payload))
        handler = getattr(self, f"_on_{type(request).__name__}")
        result = handler(request, now)
        if isinstance(result, tuple):
            ready, message = result
        else:
            ready, message = now, result
        if isinstance(message, m.Nak):
            return ready, self._nak(frame, NakReason(message.reason), message.detail)
        return ready, self._frame(frame.seq, m.reply_command(frame.command), message.pack())

    # ------------------------------------------------------------------ commands

    def _range_ok(self, first: int, count: int, limit: int) -> bool:
        return count >= 1 and first + count <= limit

    def _on_Identify(self, _: m.Identify, now: float) -> m.Message:
        s = self.spec
        return m.IdentifyReply(
            self.params.model,
            (int(self.params.firmware[0]), int(self.params.firmware[1]), int(self.params.firmware[2])),
            s.outputs,
            s.monitor_inputs,
            s.dac_bits,
            s.adc_bits,
            round(s.full_scale_volts * 1000),
            round(self.detectors.adc_full_scale_volts * 1e6),
            self.serial,
            self.boot_count,
            tuple(round(g) for g in s.monitor_gains_ohms),
        )

    def _on_WriteOutputs(self, req: m.WriteOutputs, now: float) -> m.Message:
        count = len(req.values)
        if not self._range_ok(req.first, count, self.spec.outputs):
            return m.Nak(0, NakReason.BAD_CHANNEL, req.first)
        top = (1 << self.spec.dac_bits) - 1
        for i, code in enumerate(req.values):
            if code > top:
                return m.Nak(0, NakReason.BAD_VALUE, i)
        new = np.array(req.values, dtype=np.int64)
        current = self.codes[req.first : req.first + count]
        if self.tripped_at is not None and (new > current).any():
            return m.Nak(0, NakReason.WATCHDOG_TRIPPED)
        if self.flags & StatusFlag.POWER_ON and (new > current).any():
            # Freshly booted: a write meant for the outputs before the reset (a retransmission,
            # or a host that has not noticed yet) must not jump them from zero.
            return m.Nak(0, NakReason.POWERED_ON)
        self.codes[req.first : req.first + count] = new
        self.writes_executed += 1
        self.write_log.append((now, "write", req.first, tuple(new.tolist())))
        self._drive(now)
        return m.OutputsReply(req.first, tuple(self.codes[req.first : req.first + count].tolist()))

    def _on_ReadOutputs(self, req: m.ReadOutputs, now: float) -> m.Message:
        if not self._range_ok(req.first, req.count, self.spec.outputs):
            return m.Nak(0, NakReason.BAD_CHANNEL, req.first)
        # During a watchdog ramp the outputs are below the latched codes: report what is really out.
        effective = np.round(self.commanded_volts(now) / self.lsb_volts).astype(np.int64)
        return m.OutputsReply(req.first, tuple(int(c) for c in effective[req.first : req.first + req.count]))

    def _on_ReadSense(self, req: m.ReadSense, now: float) -> m.Message:
        if not self._range_ok(req.first, req.count, self.spec.outputs):
            return m.Nak(0, NakReason.BAD_CHANNEL, req.first)
        volts = self.output_volts(now)[req.first : req.first + req.count]
        volts = volts + self.params.sense_noise_volts * self.rng.standard_normal(req.count)
        return m.SenseReply(req.first, tuple(round(v * 1e6) for v in volts))

    def _on_ReadMonitors(self, req: m.ReadMonitors, now: float) -> m.Message | tuple[float, m.Message]:
        if not self._range_ok(req.first, req.count, self.spec.monitor_inputs):
            return m.Nak(0, NakReason.BAD_CHANNEL, req.first)
        if not 1 <= req.integration_us <= MAX_INTEGRATION_US:
            return m.Nak(0, NakReason.BAD_VALUE, 0)
        inputs = np.arange(req.first, req.first + req.count)
        monitors = self.wiring.input_monitor[inputs]
        taps = self.wiring.tap_powers_w(now)
        power = np.zeros(req.count)
        wired = monitors >= 0
        power[wired] = taps[monitors[wired]]
        extra = np.zeros(req.count)
        for k, i in enumerate(inputs):
            if i in self.faults.dead_inputs:
                power[k] = 0.0
            extra[k] = self.faults.noisy_inputs.get(int(i), 0.0)
        gains = np.array(self.spec.monitor_gains_ohms)[self.gain_index[inputs]]
        d = self.detectors
        counts = detect(
            power,
            self.responsivity,
            d.dark_current_a,
            gains,
            req.integration_us * 1e-6,
            self.spec.adc_bits,
            d.adc_full_scale_volts,
            self.rng,
            d.temperature_k,
            extra,
        )
        for k, i in enumerate(inputs):
            if i in self.faults.saturated_inputs:
                counts[k] = (1 << self.spec.adc_bits) - 1
        ready = now + req.integration_us * 1e-6
        return ready, m.MonitorsReply(req.first, req.integration_us, tuple(int(c) for c in counts))

    def _on_SetMonitorGain(self, req: m.SetMonitorGain, now: float) -> m.Message:
        if not self._range_ok(req.first, len(req.values), self.spec.monitor_inputs):
            return m.Nak(0, NakReason.BAD_CHANNEL, req.first)
        for i, g in enumerate(req.values):
            if g >= len(self.spec.monitor_gains_ohms):
                return m.Nak(0, NakReason.BAD_VALUE, i)
        self.gain_index[req.first : req.first + len(req.values)] = req.values
        return m.GainReply(req.first, req.values)

    def _on_ConfigureWatchdog(self, req: m.ConfigureWatchdog, now: float) -> m.Message:
        if req.action not in tuple(WatchdogAction) or (req.action != WatchdogAction.OFF and req.timeout_ms == 0):
            return m.Nak(0, NakReason.BAD_VALUE, 0)
        self.watchdog_ms = req.timeout_ms
        self.watchdog_action = WatchdogAction(req.action)
        return m.WatchdogReply(req.timeout_ms, req.action)

    def _on_Heartbeat(self, _: m.Heartbeat, now: float) -> m.Message:
        return m.HeartbeatReply(self._uptime_ms(now), self.boot_count)

    def _on_ZeroAll(self, _: m.ZeroAll, now: float) -> m.Message:
        self.write_log.append((now, "zero", 0, ()))
        self.codes[:] = 0
        self._drive(now)
        return m.Ack()

    def _on_Status(self, _: m.Status, now: float) -> m.Message:
        remaining = 0
        if self.watchdog_action != WatchdogAction.OFF and self.tripped_at is None:
            remaining = max(0, round((self.last_valid + self.watchdog_ms / 1000.0 - now) * 1000))
        flags = self.flags | (StatusFlag.OUTPUT_FAULT if self.faults.short else 0)
        flags |= StatusFlag.INTERLOCK_OPEN if self.interlock_open else 0
        return m.StatusReply(
            int(flags), self.boot_count, self._uptime_ms(now), remaining, self.crc_errors, self.framing_errors
        )

    def _on_Reset(self, _: m.Reset, now: float) -> m.Message:
        return m.Ack()  # the reset itself happens after the reply is queued (see receive)

    def _on_ClearFaults(self, _: m.ClearFaults, now: float) -> m.Message:
        if self.tripped_at is not None:
            # Outputs stay where the watchdog action left them; codes now say so.
            self.codes = np.round(self.commanded_volts(now) / self.lsb_volts).astype(np.int64)
        self.tripped_at = None
        self.flags = StatusFlag(0)
        return m.Ack()

    def _uptime_ms(self, now: float) -> int:
        return int((now - self.booted_at) * 1000) & 0xFFFFFFFF
