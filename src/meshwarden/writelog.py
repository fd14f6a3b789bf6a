"""Checking what a board really received against rules 1-3 and 5, from the configuration's numbers.

A board's write log is a sequence of ``(time_s, kind, first_channel, codes)`` entries, ``kind``
one of ``write`` (codes latched from ``first_channel`` on), ``zero`` (all outputs zeroed by
command), ``output_off`` (the output ``first_channel`` switched off by command: 0 V, as an
instrument's output switch does), ``boot`` (power-on: all zero) and ``ramped_to_zero`` (the
board's own watchdog finished a ramp to zero). The simulated firmware keeps one; a logic analyser on a real link
gives the same. This checker does not use the controller's guard or configuration helpers: it
recomputes each channel's ceiling from the configured numbers (full scale, actuator limit,
pull-in margin), so a bug in the guard cannot hide itself here.

Rules checked, per channel, on the codes the board really held before each write:

1. no code above min(board full scale, actuator limit, (1 - margin) x pull-in), in the board's
   LSB = full scale / 2^bits (an unwired channel: above 0 at all);
2. no change larger than the step limit (in volts) and, between two changes of one channel,
   at least its dwell (less 0.1 % for the board clock's resolution);
5. (optional) no write at all inside a window (a daemon start that must adopt, not write).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field

from meshwarden.config.model import Config

DWELL_TOLERANCE = 0.999


@dataclass
class Violation:
    rule: str
    board: str
    channel: int
    time_s: float
    detail: str

    def __str__(self) -> str:
        return f"rule {self.rule}: board {self.board} output {self.channel} at {self.time_s:.4f} s: {self.detail}"


@dataclass
class LogCheck:
    """The outcome of checking one or more boards' logs."""

    writes: int = 0
    violations: list[Violation] = field(default_factory=list)


@dataclass(frozen=True)
class _Channel:
    ceiling_volts: float
    step_volts: float
    dwell_s: float


def _channels(config: Config, board_id: str) -> dict[int, _Channel]:
    board = next(b for b in config.rack.boards if b.id == board_id)
    margin = config.safety.pull_in_margin
    out = {}
    for act in config.chip.actuators:
        if act.output.board == board_id:
            ceiling = min(board.full_scale_volts, act.limit_volts, (1.0 - margin) * act.pull_in_volts)
            out[act.output.index] = _Channel(ceiling, act.step_limit_volts, act.dwell_s)
    return out


class BoardLogChecker:
    """Checks one board's write log as it grows: feed it new entries as often as you like."""

    def __init__(self, config: Config, board_id: str, result: LogCheck | None = None) -> None:
        board = next(b for b in config.rack.boards if b.id == board_id)
        self.board_id = board_id
        self.lsb = board.full_scale_volts / (1 << board.dac_bits)
        self.channels = _channels(config, board_id)
        self.held = [0] * board.outputs
        self.last_change = [-math.inf] * board.outputs
        self.result = result or LogCheck()
        self.no_write_windows: list[tuple[float, float]] = []

    def feed(self, log: Iterable[tuple[float, str, int, tuple[int, ...]]]) -> LogCheck:
        for t, kind, first, codes in log:
            if kind in ("zero", "boot", "ramped_to_zero"):
                self.held = [0] * len(self.held)
                continue
            if kind == "output_off":
                self.held[first] = 0
                continue
            if kind == "write":
                self._write(t, first, codes)
        return self.result

    def _violation(self, rule: str, channel: int, t: float, detail: str) -> None:
        self.result.violations.append(Violation(rule, self.board_id, channel, t, detail))

    def _write(self, t: float, first: int, codes: tuple[int, ...]) -> None:
        self.result.writes += 1
        for start, end in self.no_write_windows:
            if start <= t <= end:
                self._violation("5", first, t, "a write during start-up, before any request could cause one")
        for offset, code in enumerate(codes):
            ch = first + offset
            spec = self.channels.get(ch)
            volts, before = code * self.lsb, self.held[ch] * self.lsb
            self.held[ch] = code
            if spec is None:
                if code != 0:
                    self._violation("1", ch, t, f"unwired output set to {volts:.4f} V")
                continue
            if volts > spec.ceiling_volts + 1e-9:
                self._violation("1", ch, t, f"{volts:.4f} V above its ceiling {spec.ceiling_volts:.4f} V")
            if volts == before:
                continue
            if abs(volts - before) > spec.step_volts + 1e-9:
                self._violation("2", ch, t, f"step {before:.4f} -> {volts:.4f} V over {spec.step_volts} V")
            if t - self.last_change[ch] < spec.dwell_s * DWELL_TOLERANCE:
                gap_ms = (t - self.last_change[ch]) * 1e3
                self._violation("2", ch, t, f"changed {gap_ms:.3f} ms after the last change")
            self.last_change[ch] = t


def check_board_log(
    config: Config,
    board_id: str,
    log: Iterable[tuple[float, str, int, tuple[int, ...]]],
    no_write_windows: Iterable[tuple[float, float]] = (),
) -> LogCheck:
    """Check one whole board's write log; violations are collected, not raised."""
    checker = BoardLogChecker(config, board_id)
    checker.no_write_windows = list(no_write_windows)
    return checker.feed(log)
