"""The SCPI driver: instruments with text commands (IEEE 488.2 / SCPI 1999) over any pyserial URL.

It implements the same three hooks as the reference driver: each typed request of the reference
protocol becomes one line of SCPI program message units (joined with ``;:``), built from the
command templates of the board's ``options`` (:class:`~meshwarden.config.model.ScpiOptions`), and
the instrument's responses become the equivalent typed reply. So the base class's guarantees -
the output ceiling, the record of codes seen and its doubt, the error-rate fault, the emergency
abort - hold for it unchanged.

How each request is carried:

==================  ===================================================================
write outputs       set volts (+ output on) for each channel, then in the same line the
                    volts (+ output state) queried back and ``SYST:ERR?``; an error in
                    the queue is a refusal (the board goes into doubt), the codes read
                    back are what the base class verifies
read outputs        volts (+ output state) queried; an output that is off holds code 0
zero all            output off (if it has one) and 0 V on every channel, then ``SYST:ERR?``
identify            ``*IDN?`` (four fields) and ``*ESR?``; sizes come from the config
heartbeat, status   ``*ESR?`` (its power-on bit counts boots), interlock and watchdog
                    queries
reset               ``*RST`` is refused unless ``allow_reset`` is set
clear faults        ``*CLS``
==================  ===================================================================

What SCPI cannot give, and what follows (docs/drivers.md says it at length): there is no
sequence number, so a retransmission is not recognised by the instrument - the driver resends
only whole requests whose effect does not depend on how often they run (queries and absolute
setpoints); there is no frame check, so a corrupted character can change a value - the
readback in the same line catches it and puts the board in doubt, and the instrument's own
limit (``set_limit``, sent at open from the ceiling) bounds it; there is no boot counter - the
driver counts the power-on bit of the standard event status register, from 0 at each open.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from meshwarden.config.model import TERMINATIONS, BoardConfig, ScpiOptions
from meshwarden.drivers.port_link import PortLinkDriver
from meshwarden.drivers.scpi_text import (
    QueueEntry,
    format_volts,
    nak_reason,
    parse_error,
    parse_idn,
    parse_integer,
    parse_number,
    render,
    split_units,
)
from meshwarden.errors import MeshwardenError, ProtocolError, RefusedError
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason, StatusFlag, WatchdogAction

POWER_ON_BIT = 0x80  # IEEE 488.2 section 11.5.1: standard event status register bit 7, PON
MAX_QUEUE_DRAIN = 32
READS_EVENT_STATUS = (m.Command.IDENTIFY, m.Command.HEARTBEAT, m.Command.STATUS)


class ScpiDriver(PortLinkDriver):
    """A board (an instrument) commanded in SCPI text."""

    def __init__(self, config: BoardConfig) -> None:
        super().__init__(config)
        self.options = config.options if isinstance(config.options, ScpiOptions) else ScpiOptions()
        self._write_end = TERMINATIONS[self.options.write_termination].encode("ascii")
        self._read_end = TERMINATIONS[self.options.read_termination].encode("ascii")
        self._lsb_volts = config.full_scale_volts / (1 << config.dac_bits)
        self._gain_index = [0] * config.monitor_inputs
        self._boots = 0
        self._power_on = False
        self._opened_at = time.monotonic()
        self.last_errors: list[QueueEntry] = []  # the instrument's last error queue entries

    # ------------------------------------------------------------------ link

    def _link_opened(self) -> None:
        self._opened_at = time.monotonic()

    def _transact(self, units: list[str], responses: int, emergency: bool = False) -> list[str]:
        """Send one line of program message units and return its ``responses`` response units;
        retried whole on a timeout, a garbled or misshapen response, or a lost link."""
        line = ";:".join(u.lstrip(":") for u in units).encode("ascii") + self._write_end
        what = f"SCPI line {line[:40].decode('ascii', 'replace')!r}"
        return self._with_retries(lambda: self._attempt(line, responses, emergency), what, emergency)

    def _attempt(self, line: bytes, responses: int, emergency: bool) -> list[str] | str:
        """One send and wait: the response units, or a short reason to retry."""
        assert self.port is not None
        # Anything already waiting is a late or repeated answer to an earlier line: drop it, as
        # the reference driver drops a reply whose sequence number is not the outstanding one.
        self.port.reset_input_buffer()
        self.port.write(line)
        if responses == 0:
            return []
        deadline = time.monotonic() + self.config.timeout_s
        buffer = bytearray()
        while time.monotonic() < deadline:
            buffer += self.port.read(max(1, self.port.in_waiting))
            if self._read_end in buffer:
                text, _, _ = bytes(buffer).partition(self._read_end)
                try:
                    return split_units(text.decode("ascii"), responses)
                except (UnicodeDecodeError, ProtocolError) as exc:
                    return f"garbled response ({exc})"
            self._check_abort(emergency)
        return "timeout"

    # ------------------------------------------------------------------ the exchange

    def _exchange(self, request: m.Message) -> m.Message:
        """The handler of ``request``; a response whose units cannot be read as their data (a
        garbled number) is one more failed attempt, and the whole request is sent again - every
        request is a query or an absolute setpoint, so running it twice is running it once."""
        handler: Callable[[m.Message], m.Message] = getattr(self, f"_on_{type(request).__name__}")
        emergency = request.CODE == m.Command.ZERO_ALL
        failed_before = self.attempts_failed
        try:
            last: ProtocolError | None = None
            for _ in range(self.config.retries + 1):
                self._check_abort(emergency)
                try:
                    return handler(request)
                except ProtocolError as exc:
                    self._failed()
                    last = exc
            assert last is not None
            raise ProtocolError(f"board {self.config.id}: {last.message}", board=self.config.id) from last
        finally:
            if request.CODE in READS_EVENT_STATUS and self.attempts_failed > failed_before:
                # *ESR? clears what it reads: a lost response may have carried the power-on bit
                # of a reset we then never see. Read every output again before trusting them.
                self._doubted("a response that may have reported a power-on was lost")

    def _channel(self, index: int) -> int:
        return index + self.options.channel_base

    def _input(self, index: int) -> int:
        return index + self.options.channel_base

    def _checked(self, units: list[str], queries: int, command: int, emergency: bool = False) -> list[str] | m.Nak:
        """``units`` (with ``queries`` responses) followed by the error query in the same line:
        the responses, or a refusal when the instrument queued an error."""
        o = self.options
        reply = self._transact([*units, o.error_query], queries + 1, emergency)
        entry = parse_error(reply[-1])
        if not entry.is_error:
            self.last_errors = []
            return reply[:-1]
        self.last_errors = [entry, *self._drain_errors(emergency)]
        self.log.warning("instrument reports errors", errors=[f"{e.number} {e.text}" for e in self.last_errors])
        return m.Nak(command, nak_reason(entry.number), abs(entry.number) & 0xFFFF)

    def _drain_errors(self, emergency: bool) -> list[QueueEntry]:
        """Read the rest of the error queue, so the next check starts from an empty one."""
        out = []
        for _ in range(MAX_QUEUE_DRAIN):
            entry = parse_error(self._transact([self.options.error_query], 1, emergency)[0])
            if not entry.is_error:
                break
            out.append(entry)
        return out

    def _codes_from(self, volts_texts: list[str], states: list[str] | None) -> tuple[int, ...]:
        codes = []
        for k, text in enumerate(volts_texts):
            code = round(parse_number(text) / self._lsb_volts)
            if states is not None and parse_integer(states[k]) == 0:
                code = 0  # an output that is off drives 0 V, whatever is programmed
            codes.append(code)
        return tuple(codes)

    def _readback_units(self, channels: range) -> tuple[list[str], int]:
        o = self.options
        units = [render(o.query_volts, channel=self._channel(ch)) for ch in channels]
        if o.query_output is not None:
            units += [render(o.query_output, channel=self._channel(ch)) for ch in channels]
        return units, len(units)

    def _split_readback(self, values: list[str], count: int) -> tuple[int, ...]:
        states = values[count:] if self.options.query_output is not None else None
        return self._codes_from(values[:count], states)

    # ------------------------------------------------------------------ requests

    def _on_Identify(self, _: m.Message) -> m.Message:
        o = self.options
        idn_text, esr_text = self._transact([o.identify, o.event_status], 2)
        idn = parse_idn(idn_text)
        if o.expect_model is not None and idn.model != o.expect_model:
            raise MeshwardenError(
                f"board {self.config.id}: *IDN? reports model {idn.model!r}, the configuration expects "
                f"{o.expect_model!r} (a different instrument on {self.config.url}?)",
                board=self.config.id,
            )
        if parse_integer(esr_text) & POWER_ON_BIT:
            self._power_on = True  # powered since anyone last read the register: not counted
        self._send_limits()
        c = self.config
        return m.IdentifyReply(
            idn.model[:16],
            idn.firmware_version(),
            c.outputs,
            c.monitor_inputs,
            c.dac_bits,
            c.adc_bits,
            round(c.full_scale_volts * 1000),
            round(o.adc_full_scale_volts * 1e6),
            idn.serial_number(),
            self._boots,
            tuple(round(g) for g in c.monitor_gains_ohms),
        )

    def _send_limits(self) -> None:
        """Give the instrument each output's ceiling as its own limit, once per open: a value
        changed on the line cannot then raise an output past the hard limit."""
        o = self.options
        if o.set_limit is None:
            return
        units = [
            render(o.set_limit, channel=self._channel(ch), volts=format_volts(code * self._lsb_volts))
            for ch, code in enumerate(self.ceiling)
        ]
        for start in range(0, len(units), o.units_per_line):
            result = self._checked(units[start : start + o.units_per_line], 0, m.Command.IDENTIFY)
            if isinstance(result, m.Nak):
                raise MeshwardenError(
                    f"board {self.config.id}: the instrument refused the output limits: "
                    f"{self.last_errors[0].number} {self.last_errors[0].text}",
                    board=self.config.id,
                )

    def set_ceiling(self, codes: tuple[int, ...]) -> None:
        super().set_ceiling(codes)
        if self.port is not None:
            self._send_limits()

    def _on_WriteOutputs(self, request: m.Message) -> m.Message:
        assert isinstance(request, m.WriteOutputs)
        o = self.options
        channels = range(request.first, request.first + len(request.values))
        units = []
        for ch, code in zip(channels, request.values, strict=True):
            units.append(render(o.set_volts, channel=self._channel(ch), volts=format_volts(code * self._lsb_volts)))
            if o.output_on is not None and code > 0:
                units.append(render(o.output_on, channel=self._channel(ch)))
        readback, count = self._readback_units(channels)
        result = self._checked(units + readback, count, m.Command.WRITE_OUTPUTS)
        if isinstance(result, m.Nak):
            return result
        return m.OutputsReply(request.first, self._split_readback(result, len(channels)))

    def _on_ReadOutputs(self, request: m.Message) -> m.Message:
        assert isinstance(request, m.ReadOutputs)
        channels = range(request.first, request.first + request.count)
        codes: list[int] = []
        step = max(1, self.options.units_per_line // 2)
        for start in range(0, len(channels), step):
            part = channels[start : start + step]
            units, count = self._readback_units(part)
            codes += self._split_readback(self._transact(units, count), len(part))
        return m.OutputsReply(request.first, tuple(codes))

    def _on_ZeroAll(self, _: m.Message) -> m.Message:
        o = self.options
        units = []
        for ch in range(self.config.outputs):
            if o.output_off is not None:  # off first: the output drops at once, not along a setpoint
                units.append(render(o.output_off, channel=self._channel(ch)))
            units.append(render(o.set_volts, channel=self._channel(ch), volts=format_volts(0.0)))
        refusal: m.Nak | None = None
        for start in range(0, len(units), o.units_per_line):
            result = self._checked(units[start : start + o.units_per_line], 0, m.Command.ZERO_ALL, emergency=True)
            if isinstance(result, m.Nak) and refusal is None:
                refusal = result  # still zero the remaining channels
        return refusal or m.Ack()

    def _on_ReadSense(self, request: m.Message) -> m.Message:
        assert isinstance(request, m.ReadSense)
        if self.options.read_sense is None:
            return m.Nak(m.Command.READ_SENSE, NakReason.UNKNOWN_COMMAND)
        channels = range(request.first, request.first + request.count)
        units = [render(self.options.read_sense, channel=self._channel(ch)) for ch in channels]
        values = self._transact(units, len(units))
        return m.SenseReply(request.first, tuple(round(parse_number(v) * 1e6) for v in values))

    def _on_ReadMonitors(self, request: m.Message) -> m.Message:
        assert isinstance(request, m.ReadMonitors)
        template = self.options.read_input
        if template is None:
            return m.Nak(m.Command.READ_MONITORS, NakReason.UNKNOWN_COMMAND)
        inputs = range(request.first, request.first + request.count)
        integration = f"{request.integration_us * 1e-6:.6g}"
        units = [render(template, input=self._input(i), integration_s=integration) for i in inputs]
        top = (1 << self.config.adc_bits) - 1
        scale = (1 << self.config.adc_bits) / self.options.adc_full_scale_volts
        counts = []
        for i, text in zip(inputs, self._transact(units, len(units)), strict=True):
            gain = self.config.monitor_gains_ohms[self._gain_index[i]]
            counts.append(min(max(round(parse_number(text) * gain * scale), 0), top))
        return m.MonitorsReply(request.first, request.integration_us, tuple(counts))

    def _on_SetMonitorGain(self, request: m.Message) -> m.Message:
        assert isinstance(request, m.SetMonitorGain)
        gains = self.config.monitor_gains_ohms
        if any(g >= len(gains) for g in request.values):
            return m.Nak(m.Command.SET_MONITOR_GAIN, NakReason.BAD_VALUE)
        template = self.options.set_gain
        if template is None:
            if any(request.values):
                return m.Nak(m.Command.SET_MONITOR_GAIN, NakReason.BAD_VALUE)  # only the fixed first gain
        else:
            units = [
                render(template, input=self._input(request.first + k), ohms=f"{gains[g]:g}")
                for k, g in enumerate(request.values)
            ]
            result = self._checked(units, 0, m.Command.SET_MONITOR_GAIN)
            if isinstance(result, m.Nak):
                return result
        for k, g in enumerate(request.values):
            self._gain_index[request.first + k] = g
        return m.GainReply(request.first, request.values)

    def _on_ConfigureWatchdog(self, request: m.Message) -> m.Message:
        assert isinstance(request, m.ConfigureWatchdog)
        o = self.options
        if o.watchdog is None:
            self.log.warning("the instrument has no watchdog: outputs stay if the daemon stops")
            return m.WatchdogReply(request.timeout_ms, request.action)
        word = o.watchdog_words[WatchdogAction(request.action)]
        unit = render(o.watchdog, timeout_s=f"{request.timeout_ms / 1000:g}", action=word)
        result = self._checked([unit], 0, m.Command.CONFIGURE_WATCHDOG)
        if isinstance(result, m.Nak):
            return result
        return m.WatchdogReply(request.timeout_ms, request.action)

    def _event_status(self, value: str) -> None:
        if parse_integer(value) & POWER_ON_BIT:
            self._boots += 1
            self._power_on = True
            self.log.warning("instrument reports power-on: counted as a reset", boots=self._boots)

    def _uptime_ms(self) -> int:
        return int((time.monotonic() - self._opened_at) * 1000) & 0xFFFFFFFF

    def _on_Heartbeat(self, _: m.Message) -> m.Message:
        (esr,) = self._transact([self.options.event_status], 1)
        self._event_status(esr)
        return m.HeartbeatReply(self._uptime_ms(), self._boots)

    def _on_Status(self, _: m.Message) -> m.Message:
        o = self.options
        units = [o.event_status] + [q for q in (o.watchdog_query, o.interlock_query) if q is not None]
        values = self._transact(units, len(units))
        self._event_status(values[0])
        flags = StatusFlag(0)
        rest = values[1:]
        if o.watchdog_query is not None and parse_integer(rest.pop(0)):
            flags |= StatusFlag.WATCHDOG_TRIPPED
        if o.interlock_query is not None and parse_integer(rest.pop(0)):
            flags |= StatusFlag.INTERLOCK_OPEN
        if self._power_on:
            flags |= StatusFlag.POWER_ON
        return m.StatusReply(int(flags), self._boots, self._uptime_ms(), 0, 0, 0)

    def _on_Reset(self, _: m.Message) -> m.Message:
        if not self.options.allow_reset:
            raise RefusedError(
                f"board {self.config.id}: {self.options.reset} is refused (a SCPI reset also resets settings "
                "the daemon does not know of); set options.allow_reset to permit it",
                board=self.config.id,
            )
        self._transact([self.options.reset], 0)
        return m.Ack()

    def _on_ClearFaults(self, _: m.Message) -> m.Message:
        result = self._checked([self.options.clear_status], 0, m.Command.CLEAR_FAULTS)
        if isinstance(result, m.Nak):
            return result
        self._power_on = False
        return m.Ack()


__all__ = ["ScpiDriver"]
