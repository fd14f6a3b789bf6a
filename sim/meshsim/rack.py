"""A simulated rack: boards wired to one chip, a clock, injected faults, and one lock around it all.

Transports (pty, TCP, the in-process URL) call :meth:`SimRack.exchange` with the bytes a host
sent to one board and get back the bytes to return, each with the simulated time at which it
is ready (a monitor read takes its integration time; a delayed reply takes longer). Link faults
are applied here, between the cable and the firmware, so every transport suffers them alike.

Tests reach the truth through :meth:`SimRack.truth` and :meth:`SimRack.board`; nothing a
transport carries exposes it.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from meshsim.chip import ChipTruth, SimChip
from meshsim.clock import SimClock
from meshsim.faults import LINK_KINDS, Fault, FaultSpecError, parse_faults
from meshsim.firmware import BoardWiring, SimBoard
from meshsim.params import SimParams, parse_params
from meshsim.scenario import Scenario, load_scenario
from meshsim.scpi import ScpiBoard
from meshwarden.protocol import Frame, decode_frame, encode_frame


@dataclass
class LinkFaults:
    """Per-board link fault rates (0..1) and an unplugged window."""

    rates: dict[str, float] = field(default_factory=dict)
    delay_s: float = 0.2
    unplugged: list[tuple[float, float]] = field(default_factory=list)

    def is_unplugged(self, now: float) -> bool:
        return any(start <= now < end for start, end in self.unplugged)


class SimRack:
    """The whole simulated rack behind one lock."""

    def __init__(
        self, scenario: Scenario, params: SimParams, clock: SimClock | None = None, faults: list[Fault] | None = None
    ) -> None:
        self.scenario = scenario
        self.params = params
        self.clock = clock or SimClock()
        self.lock = threading.RLock()
        seeds = np.random.SeedSequence(params.seed).spawn(3 + len(scenario.boards))
        self.chip = SimChip(scenario, params, np.random.default_rng(seeds[0]))
        self._link_rng = np.random.default_rng(seeds[1])
        self.boards: dict[str, SimBoard] = {}
        self.links: dict[str, LinkFaults] = {}
        self.pending_resets: list[Fault] = []
        self.interlock_windows: dict[str, list[tuple[float, float]]] = {}  # board -> open from, until
        self.interlock_forced: dict[str, bool] = {}  # board -> set by set_interlock (wins over windows)
        actuator_index = {a.id: i for i, a in enumerate(scenario.actuators)}
        monitor_index = {mon.id: i for i, mon in enumerate(scenario.monitors)}
        for number, spec in enumerate(scenario.boards):
            channel_actuator = np.full(spec.outputs, -1, dtype=np.int64)
            for a in scenario.actuators:
                if a.board == spec.id and a.channel < spec.outputs:
                    channel_actuator[a.channel] = actuator_index[a.id]
            input_monitor = np.full(spec.monitor_inputs, -1, dtype=np.int64)
            for mon in scenario.monitors:
                if mon.board == spec.id and mon.input < spec.monitor_inputs:
                    input_monitor[mon.input] = monitor_index[mon.id]
            wiring = BoardWiring(self.chip.apply_volts, self.chip.tap_powers_w, channel_actuator, input_monitor)
            self.boards[spec.id] = SimBoard(
                spec,
                0x1000 + number + 1,
                wiring,
                params.board,
                params.detectors,
                params.laser,
                np.random.default_rng(seeds[3 + number]),
            )
            self.links[spec.id] = LinkFaults()
        # The SCPI personality: a text front end over the same firmware (meshsim.scpi).
        self.scpi: dict[str, ScpiBoard] = (
            {b: ScpiBoard(board) for b, board in self.boards.items()} if params.personality == "scpi" else {}
        )
        for fault in faults or []:
            self.inject(fault)

    # ------------------------------------------------------------------ construction

    @classmethod
    def from_config(
        cls, path: str | Path, *, seed: int | None = None, faults: str = "", clock: SimClock | None = None
    ) -> SimRack:
        scenario = load_scenario(path)
        params = parse_params(scenario.simulator, seed)
        return cls(scenario, params, clock, parse_faults(faults))

    # ------------------------------------------------------------------ traffic

    def exchange(self, board_id: str, data: bytes) -> list[tuple[float, bytes]]:
        """Bytes from the host to ``board_id`` in; (ready time, bytes) replies out."""
        with self.lock:
            now = self.clock.now()
            self._tick(now)
            link = self.links[board_id]
            if link.is_unplugged(now):
                return []
            incoming = self._mangle_incoming(link, data)
            if incoming is None:
                return []
            front = self.scpi.get(board_id) or self.boards[board_id]
            replies = front.receive(incoming, now)
            out: list[tuple[float, bytes]] = []
            for ready, reply in replies:
                out.extend(self._mangle_outgoing(link, ready, reply))
            return out

    def tick(self) -> None:
        """Let simulated time act on every board (watchdogs, ramps, scheduled resets)."""
        with self.lock:
            self._tick(self.clock.now())

    def _tick(self, now: float) -> None:
        due = [f for f in self.pending_resets if f.at_s is not None and f.at_s <= now]
        for fault in due:
            self.pending_resets.remove(fault)
            self.boards[fault.target].power_cycle(now)
        for board_id, board in self.boards.items():
            if board_id in self.interlock_forced:
                board.interlock_open = self.interlock_forced[board_id]
            elif board_id in self.interlock_windows:
                board.interlock_open = any(a <= now < b for a, b in self.interlock_windows[board_id])
            board.tick(now)

    def set_interlock(self, board_id: str, is_open: bool | None) -> None:
        """Open (True) or close (False) a board's interlock contact now; None hands it back to
        the ``interlock`` faults' time windows."""
        with self.lock:
            if board_id not in self.boards:
                raise FaultSpecError(f"no board {board_id!r}")
            if is_open is None:
                self.interlock_forced.pop(board_id, None)
            else:
                self.interlock_forced[board_id] = is_open
            self._tick(self.clock.now())

    def _chance(self, link: LinkFaults, kind: str) -> bool:
        rate = link.rates.get(kind, 0.0)
        return rate > 0.0 and bool(self._link_rng.random() < rate)

    def _mangle_incoming(self, link: LinkFaults, data: bytes) -> bytes | None:
        if self._chance(link, "drop"):
            return None
        if data and self._chance(link, "corrupt"):
            data = _flip_bit(data, self._link_rng)
        return data

    def _mangle_outgoing(self, link: LinkFaults, ready: float, reply: bytes) -> list[tuple[float, bytes]]:
        if self._chance(link, "drop"):
            return []
        if self._chance(link, "wrong_address") and not self.scpi:  # a SCPI line carries no address
            frame = decode_frame(reply[:-1])
            reply = encode_frame(Frame((frame.address % 254) + 1, frame.seq, frame.command, frame.payload))
        if self._chance(link, "corrupt"):
            reply = _flip_bit(reply, self._link_rng)
        if self._chance(link, "garbage"):
            junk = self._link_rng.integers(0, 256, int(self._link_rng.integers(1, 24)), dtype=np.uint8).tobytes()
            reply = junk + reply
        if self._chance(link, "delay"):
            ready += link.delay_s
        out = [(ready, reply)]
        if self._chance(link, "repeat"):
            out.append((ready, reply))
        return out

    # ------------------------------------------------------------------ faults

    def inject(self, fault: Fault) -> None:
        """Apply one fault now (or schedule it, for resets)."""
        with self.lock:
            now = self.clock.now()
            boards = list(self.boards) if fault.target == "*" else [fault.target.split(":")[0]]
            if fault.kind in LINK_KINDS or fault.kind in ("unplug", "reset", "interlock"):
                for b in boards:
                    if b not in self.boards:
                        raise FaultSpecError(f"fault {fault.kind}: no board {b!r}")
            if fault.kind in LINK_KINDS:
                for b in boards:
                    self.links[b].rates[fault.kind] = fault.value
                    if fault.kind == "delay":
                        self.links[b].delay_s = fault.extra
            elif fault.kind == "unplug":
                for b in boards:
                    self.links[b].unplugged.append((fault.at_s or 0.0, fault.until_s or float("inf")))
            elif fault.kind == "interlock":
                for b in boards:
                    start = fault.at_s if fault.at_s is not None else now
                    self.interlock_windows.setdefault(b, []).append((start, fault.until_s or float("inf")))
                self._tick(now)
            elif fault.kind == "reset":
                self.pending_resets.extend(Fault("reset", b, at_s=fault.at_s) for b in boards)
            elif fault.kind == "stuck":
                self._actuator(fault.target)
                self.chip.force_stuck(fault.target, now)
            elif fault.kind == "open_wire":
                board, channel = self._wire_of(fault.target)
                board.faults.open_wire.add(channel)
                board._drive(now)
            elif fault.kind in ("dead_channel", "short"):
                board_id, _, ch = fault.target.partition(":")
                if board_id not in self.boards:
                    raise FaultSpecError(f"fault {fault.kind}: no board {board_id!r}")
                board = self.boards[board_id]
                if fault.kind == "dead_channel":
                    board.faults.dead.add(int(ch))
                else:
                    board.faults.short[int(ch)] = fault.value
                board._drive(now)
            else:
                board, inp = self._input_of(fault.target)
                if fault.kind == "dead_monitor":
                    board.faults.dead_inputs.add(inp)
                elif fault.kind == "saturated_monitor":
                    board.faults.saturated_inputs.add(inp)
                else:
                    board.faults.noisy_inputs[inp] = fault.value

    def _actuator(self, actuator_id: str) -> int:
        if actuator_id not in self.chip.index:
            raise FaultSpecError(f"no actuator {actuator_id!r}")
        return self.chip.index[actuator_id]

    def _wire_of(self, actuator_id: str) -> tuple[SimBoard, int]:
        self._actuator(actuator_id)
        spec = next(a for a in self.scenario.actuators if a.id == actuator_id)
        return self.boards[spec.board], spec.channel

    def _input_of(self, monitor_id: str) -> tuple[SimBoard, int]:
        for mon in self.scenario.monitors:
            if mon.id == monitor_id:
                return self.boards[mon.board], mon.input
        raise FaultSpecError(f"no monitor {monitor_id!r}")

    # ------------------------------------------------------------------ inspection (tests only)

    def truth(self) -> ChipTruth:
        """The chip's real state now: displacements, phases, couplings, pulled-in and stuck actuators."""
        with self.lock:
            now = self.clock.now()
            self._tick(now)
            return self.chip.truth(now)

    def board(self, board_id: str) -> SimBoard:
        """A board's firmware state (codes, flags, boot counter) for inspection."""
        return self.boards[board_id]


def _flip_bit(data: bytes, rng: np.random.Generator) -> bytes:
    out = bytearray(data)
    position = int(rng.integers(0, len(out) * 8))
    out[position // 8] ^= 1 << (position % 8)
    return bytes(out)
