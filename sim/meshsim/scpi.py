"""The SCPI personality of a simulated board: text commands in, text responses out.

Selected with ``personality: scpi`` in the simulator section, every board of the rack then
speaks a small SCPI dialect (IEEE 488.2 common commands and SCPI 1999 style headers) instead of
the reference protocol, over the same pty, TCP or in-process links and with the same link
faults. Underneath it is the same firmware (:class:`meshsim.firmware.SimBoard`): a write still
goes through its power-on interlock and watchdog rules and lands in its ``write_log``, so tests
observe both personalities alike.

The dialect (``<n>`` is a channel suffix counted from 1; keywords in short or long form, any
case; program message units separated by ``;``, each taken as rooted, a leading ``:`` allowed)::

    *IDN?  *RST  *CLS  *ESR?  *OPC?
    SOURce<n>:VOLTage[:LEVel] <volts>      SOURce<n>:VOLTage[:LEVel]?
    SOURce<n>:VOLTage:LIMit <volts>        SOURce<n>:VOLTage:LIMit?
    OUTPut<n>[:STATe] ON|OFF|1|0           OUTPut<n>[:STATe]?
    MEASure<n>:VOLTage?                    (the output sense)
    INPut<n>:CURRent? [<aperture s>]       INPut<n>:GAIN <ohms>     INPut<n>:GAIN?
    SYSTem:ERRor[:NEXT]?                   SYSTem:INTerlock?        (1 open, 0 closed)
    SYSTem:WDOG <seconds>,OFF|HOLD|ZERO    SYSTem:WDOG:TRIPped?

Outputs are off at power-on (as instruments come up); an output that is off drives 0 V and
keeps its programmed voltage for when it is switched on. Switching an output off is logged in
the firmware's ``write_log`` as ``(time, "output_off", channel, ())``. ``*CLS`` also clears the firmware's
power-on and watchdog flags (what clear faults does in the reference protocol). The error queue
holds 16 entries; when full, the last is replaced by -350 "Queue overflow".
"""

from __future__ import annotations

import re
from collections import deque
from dataclasses import dataclass

import numpy as np

from meshsim.firmware import BOOT_TIME_S, SimBoard
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason, StatusFlag, WatchdogAction

QUEUE_LENGTH = 16
LINE_LIMIT = 65536
PON, CME, EXE, DDE, QYE = 0x80, 0x20, 0x10, 0x08, 0x04  # standard event status bits

# SCPI 1999 Vol. 2 ch. 21.8 standard error numbers and texts (device-specific ones are positive).
ERRORS = {
    -100: "Command error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -350: "Queue overflow",
    -410: "Query INTERRUPTED",
    101: "Watchdog tripped",
    102: "Powered on; clear status first",
    103: "Output fault",
}
_NAK_ERRORS = {
    NakReason.WATCHDOG_TRIPPED: 101,
    NakReason.POWERED_ON: 102,
    NakReason.OUTPUT_FAULT: 103,
    NakReason.BAD_VALUE: -222,
    NakReason.BAD_CHANNEL: -114,
}
_WATCHDOG_WORDS = {"OFF": WatchdogAction.OFF, "HOLD": WatchdogAction.HOLD, "ZERO": WatchdogAction.RAMP_TO_ZERO}
_NODE = re.compile(r"^([A-Za-z*]+)(\d*)$")


class ScpiError(Exception):
    """One SCPI error to queue: its standard number."""

    def __init__(self, number: int) -> None:
        super().__init__(number)
        self.number = number


def _keyword(token: str, long_form: str) -> bool:
    """A header keyword matches in its short form (the capitals) or its long form, any case."""
    short = "".join(c for c in long_form if c.isupper() or c == "*")
    return token.upper() in (short, long_form.upper())


@dataclass(frozen=True)
class _Unit:
    nodes: tuple[tuple[str, int | None], ...]  # keyword, numeric suffix
    query: bool
    args: tuple[str, ...]


def _parse_unit(text: str) -> _Unit:
    header, _, rest = text.strip().partition(" ")
    header = header.lstrip(":")
    query = header.endswith("?")
    header = header.rstrip("?")
    if not header:
        raise ScpiError(-100)
    nodes = []
    for part in header.split(":"):
        match = _NODE.match(part)
        if not match:
            raise ScpiError(-113)
        nodes.append((match.group(1), int(match.group(2)) if match.group(2) else None))
    args = tuple(a.strip() for a in rest.split(",")) if rest.strip() else ()
    return _Unit(tuple(nodes), query, args)


def _number(unit: _Unit, index: int = 0) -> float:
    if len(unit.args) <= index:
        raise ScpiError(-109)
    try:
        value = float(unit.args[index])
    except ValueError:
        raise ScpiError(-104) from None
    if not np.isfinite(value):
        raise ScpiError(-104)
    return value


def _format(volts: float) -> str:
    return f"{volts:.6f}"


class ScpiBoard:
    """One board's SCPI front end over its firmware; :meth:`receive` like the firmware's."""

    def __init__(self, board: SimBoard) -> None:
        self.board = board
        self._buffer = bytearray()
        self._undriven = False  # outputs switched off but not yet pushed to the chip
        self._boot_seen = -1
        self._sync_boot()

    def _sync_boot(self) -> None:
        """After every (re)boot of the firmware: outputs off, programmed 0 V, PON set, queue empty."""
        if self._boot_seen == self.board.boot_count:
            return
        self._boot_seen = self.board.boot_count
        spec = self.board.spec
        self.programmed = np.zeros(spec.outputs, dtype=np.int64)
        self.enabled = np.zeros(spec.outputs, dtype=bool)
        self.limit_volts = np.full(spec.outputs, spec.full_scale_volts)
        self.errors: deque[int] = deque()
        self.esr = PON
        self._buffer.clear()

    # ------------------------------------------------------------------ bytes

    def receive(self, data: bytes, now: float) -> list[tuple[float, bytes]]:
        """Consume bytes; return one response line per program message that has queries."""
        self.board.tick(now)
        self._sync_boot()
        if now < self.board.booted_at + BOOT_TIME_S:
            return []  # still booting: the UART is not listening yet
        self._buffer += data
        replies: list[tuple[float, bytes]] = []
        while b"\n" in self._buffer:
            line, _, rest = bytes(self._buffer).partition(b"\n")
            self._buffer = bytearray(rest)
            ready, response = self._message(line.rstrip(b"\r"), now)
            if response is not None:
                replies.append((ready, response.encode("ascii") + b"\n"))
            if self._boot_seen != self.board.boot_count:  # *RST: the rest of the input is lost
                self._sync_boot()
                break
        if len(self._buffer) > LINE_LIMIT:
            self._buffer.clear()
            self._queue(-100)
        return replies

    def _message(self, line: bytes, now: float) -> tuple[float, str | None]:
        try:
            text = line.decode("ascii")
        except UnicodeDecodeError:
            self._queue(-100)
            return now, None
        if not text.strip():
            return now, None
        self.board.last_valid = now  # any message feeds the watchdog
        try:
            return self._units(text, now)
        finally:
            if self._undriven:
                self._undriven = False
                self.board._drive(now)

    def _units(self, text: str, now: float) -> tuple[float, str | None]:
        responses: list[str] = []
        ready = now
        for raw in text.split(";"):
            try:
                unit = _parse_unit(raw)
                answer = self._execute(unit, now)
            except ScpiError as exc:
                self._queue(exc.number)
                if exc.number <= -100 and exc.number > -200:
                    break  # a command error abandons the rest of the message
                continue
            if isinstance(answer, tuple):
                ready = max(ready, answer[0])
                answer = answer[1]
            if answer is not None:
                responses.append(answer)
            if self._boot_seen != self.board.boot_count:
                break
        return ready, (";".join(responses) if responses else None)

    def _queue(self, number: int) -> None:
        self.esr |= CME if -200 < number <= -100 else EXE if -300 < number <= -200 else QYE if number <= -400 else DDE
        if len(self.errors) >= QUEUE_LENGTH:
            self.errors[-1] = -350
        else:
            self.errors.append(number)

    # ------------------------------------------------------------------ commands

    def _channel(self, suffix: int | None, limit: int) -> int:
        index = (suffix if suffix is not None else 1) - 1
        if not 0 <= index < limit:
            raise ScpiError(-114)
        return index

    def _execute(self, unit: _Unit, now: float) -> str | tuple[float, str] | None:
        head, suffix = unit.nodes[0]
        rest = [n for n, _ in unit.nodes[1:]]
        if head.startswith("*"):
            return self._common(head.upper(), unit, now)
        if _keyword(head, "SOURce"):
            return self._source(self._channel(suffix, self.board.spec.outputs), rest, unit, now)
        if _keyword(head, "OUTPut") and all(_keyword(r, "STATe") for r in rest):
            return self._output(self._channel(suffix, self.board.spec.outputs), unit, now)
        if _keyword(head, "MEASure") and len(rest) == 1 and _keyword(rest[0], "VOLTage") and unit.query:
            ch = self._channel(suffix, self.board.spec.outputs)
            reply = self._firmware(m.ReadSense(ch, 1), now)
            assert isinstance(reply, m.SenseReply)
            return _format(reply.values[0] * 1e-6)
        if _keyword(head, "INPut"):
            return self._input(self._channel(suffix, self.board.spec.monitor_inputs), rest, unit, now)
        if _keyword(head, "SYSTem") and rest:
            return self._system(rest, unit, now)
        raise ScpiError(-113)

    def _common(self, head: str, unit: _Unit, now: float) -> str | None:
        if head == "*IDN" and unit.query:
            major, minor, patch = self.board.params.firmware
            return f"MESHSIM,{self.board.params.model},{self.board.serial},{major}.{minor}.{patch}"
        if head == "*RST" and not unit.query:
            self.board.power_cycle(now)
            return None
        if head == "*CLS" and not unit.query:
            self.errors.clear()
            self.esr = 0
            self._firmware(m.ClearFaults(), now)
            self.programmed[self.enabled] = self.board.codes[self.enabled]  # where a watchdog left them
            return None
        if head == "*ESR" and unit.query:
            value, self.esr = self.esr, 0
            return str(value)
        if head == "*OPC" and unit.query:
            return "1"
        raise ScpiError(-113)

    def _source(self, ch: int, rest: list[str], unit: _Unit, now: float) -> str | None:
        if not rest or not _keyword(rest[0], "VOLTage"):
            raise ScpiError(-113)
        lsb = self.board.lsb_volts
        if len(rest) == 2 and _keyword(rest[1], "LIMit"):
            if unit.query:
                return _format(float(self.limit_volts[ch]))
            volts = _number(unit)
            if not 0.0 <= volts <= self.board.spec.full_scale_volts:
                raise ScpiError(-222)
            self.limit_volts[ch] = volts  # restricts raises only: a move down is always allowed
            return None
        if (len(rest) == 2 and not _keyword(rest[1], "LEVel")) or len(rest) > 2:
            raise ScpiError(-113)
        if unit.query:
            return _format(self._setpoint(ch, now) * lsb)
        volts = _number(unit)
        code = round(volts / lsb)
        if volts < 0.0 or code > (1 << self.board.spec.dac_bits) - 1:
            raise ScpiError(-222)
        if volts > self.limit_volts[ch] + lsb / 2 and code > self.programmed[ch]:
            raise ScpiError(-221)
        if self.enabled[ch]:
            self._write(ch, code, now)
        self.programmed[ch] = code
        return None

    def _setpoint(self, ch: int, now: float) -> int:
        """The channel's setpoint as a code: lowered by the firmware's watchdog ramp while the
        output is on (the instrument's own action changes its setpoint, as a real one reports)."""
        if not self.enabled[ch]:
            return int(self.programmed[ch])
        return round(float(self.board.commanded_volts(now)[ch]) / self.board.lsb_volts)

    def _output(self, ch: int, unit: _Unit, now: float) -> str | None:
        if unit.query:
            return "1" if self.enabled[ch] else "0"
        if len(unit.args) != 1:
            raise ScpiError(-109 if not unit.args else -108)
        word = unit.args[0].upper()
        if word not in ("ON", "OFF", "1", "0"):
            raise ScpiError(-224)
        on = word in ("ON", "1")
        if on and not self.enabled[ch]:
            self._write(ch, int(self.programmed[ch]), now)
        elif not on and self.enabled[ch]:
            # Switched off by command: the output drops to 0 V at once, as a zero all does in the
            # reference protocol (logged "output_off" for this channel, not as a write).
            self.programmed[ch] = self._setpoint(ch, now)
            self.board.codes[ch] = 0
            self.board.write_log.append((now, "output_off", ch, ()))
            self._undriven = True  # pushed to the chip once, at the end of the message
        self.enabled[ch] = on
        return None

    def _input(self, inp: int, rest: list[str], unit: _Unit, now: float) -> str | tuple[float, str] | None:
        gains = [round(g) for g in self.board.spec.monitor_gains_ohms]
        if len(rest) == 1 and _keyword(rest[0], "GAIN"):
            if unit.query:
                return str(gains[int(self.board.gain_index[inp])])
            ohms = round(_number(unit))
            if ohms not in gains:
                raise ScpiError(-224)
            self._firmware(m.SetMonitorGain(inp, (gains.index(ohms),)), now)
            return None
        if len(rest) == 1 and _keyword(rest[0], "CURRent") and unit.query:
            aperture_s = _number(unit) if unit.args else 1e-3
            integration_us = round(aperture_s * 1e6)
            if not 1 <= integration_us <= 1_000_000:
                raise ScpiError(-222)
            result = self.board._on_ReadMonitors(m.ReadMonitors(inp, 1, integration_us), now)
            ready, reply = result if isinstance(result, tuple) else (now, result)
            assert isinstance(reply, m.MonitorsReply)
            spec, det = self.board.spec, self.board.detectors
            gain = spec.monitor_gains_ohms[int(self.board.gain_index[inp])]
            amps = reply.counts[0] / (1 << spec.adc_bits) * det.adc_full_scale_volts / gain
            return ready, f"{amps:.9e}"
        raise ScpiError(-113)

    def _system(self, rest: list[str], unit: _Unit, now: float) -> str | None:
        if _keyword(rest[0], "ERRor") and unit.query and (len(rest) == 1 or _keyword(rest[1], "NEXT")):
            number = self.errors.popleft() if self.errors else 0
            text = ERRORS.get(number, "Device-specific error") if number else "No error"
            return f'{number},"{text}"'
        if _keyword(rest[0], "INTerlock") and unit.query and len(rest) == 1:
            return "1" if self.board.interlock_open else "0"
        if _keyword(rest[0], "WDOG") and len(rest) == 2 and _keyword(rest[1], "TRIPped") and unit.query:
            return "1" if self.board.flags & StatusFlag.WATCHDOG_TRIPPED else "0"
        if _keyword(rest[0], "WDOG") and len(rest) == 1 and not unit.query:
            seconds = _number(unit)
            if len(unit.args) != 2 or unit.args[1].upper() not in _WATCHDOG_WORDS:
                raise ScpiError(-224)
            self._firmware(m.ConfigureWatchdog(round(seconds * 1000), _WATCHDOG_WORDS[unit.args[1].upper()]), now)
            return None
        raise ScpiError(-113)

    # ------------------------------------------------------------------ the firmware underneath

    def _write(self, ch: int, code: int, now: float) -> None:
        self._firmware(m.WriteOutputs(ch, (code,)), now)

    def _firmware(self, request: m.Message, now: float) -> m.Message:
        """Run one typed request through the firmware's own handler; its refusal becomes an error."""
        handler = getattr(self.board, f"_on_{type(request).__name__}")
        result = handler(request, now)
        reply = result[1] if isinstance(result, tuple) else result
        assert isinstance(reply, m.Message)
        if isinstance(reply, m.Nak):
            raise ScpiError(_NAK_ERRORS.get(NakReason(reply.reason), -200))
        return reply


__all__ = ["ERRORS", "ScpiBoard"]
