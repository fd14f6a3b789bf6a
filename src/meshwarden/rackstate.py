"""What the controller knows of the rack: one object that the controller's rooms share.

The controller (state machine, front door), motion (plans and writes) and supervision (bring-up,
heartbeat, recovery) all read and change the same facts: which boards are up, faulted, waiting
for restore or in doubt, what each output holds, whether the daemon is armed. They live here so
each room stays small and none keeps a private copy that could go stale.

The codes an output holds are never stored here: they are read from the board's driver, which
updates them only from verified acknowledgements, in the order the board executed them
(:meth:`meshwarden.drivers.base.BoardDriver.outputs_seen`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from meshwarden.calibration import load_calibration
from meshwarden.config.model import ActuatorConfig, BoardConfig, Config
from meshwarden.drivers.base import BoardDriver, BoardIdentity
from meshwarden.drivers.rack import Rack
from meshwarden.guard import ChannelLimit
from meshwarden.journal import Journal, TargetRecord
from meshwarden.logsetup import get_logger
from meshwarden.mapping import ActuatorMap, code_to_volts

Listener = Callable[[str, dict[str, Any]], None]


@dataclass
class ActuatorState:
    """What the controller knows of one actuator."""

    config: ActuatorConfig
    board: BoardConfig
    map: ActuatorMap
    limit: ChannelLimit
    calibration_version: str
    calibration_origin: str = "design-nominal"  # or "measured"
    value: float | None = None  # the logical value the output means now (None: set in volts or unknown)


@dataclass
class BoardState:
    """What the controller knows of one board; its output codes come from its driver."""

    config: BoardConfig
    driver: BoardDriver
    identity: BoardIdentity | None = None
    boot_count: int | None = None
    needs_restore: bool = False
    faulted: bool = False
    zero_pending: str | None = None  # an emergency stop could not confirm this board's zero: why
    interlock: str | None = None  # its interlock input, if configured: closed | open | unreadable: why
    notes: list[str] = field(default_factory=list)

    @property
    def codes(self) -> tuple[int, ...]:
        """The codes last seen latched (the last known; see :attr:`doubt`)."""
        return self.driver.outputs_seen()[0]

    @property
    def doubt(self) -> str | None:
        """Why the outputs are not known for certain now, or None when they are."""
        return self.driver.outputs_seen()[1] if self.identity is not None else "board not brought up"


def ceiling_codes(config: Config) -> dict[str, tuple[int, ...]]:
    """Each board's per-output hard-limit codes; outputs wired to no actuator get 0."""
    out: dict[str, list[int]] = {b.id: [0] * b.outputs for b in config.rack.boards}
    for act in config.chip.actuators:
        board = config.rack.board(act.output.board)
        limit = _channel_limit(config, act, board)
        out[board.id][act.output.index] = limit.hard_limit_code
    return {b: tuple(codes) for b, codes in out.items()}


def _channel_limit(config: Config, act: ActuatorConfig, board: BoardConfig) -> ChannelLimit:
    return ChannelLimit(
        act.id,
        act.kind,
        board.full_scale_volts / (1 << board.dac_bits),
        config.hard_limit_volts(act),
        act.step_limit_volts,
        act.dwell_s,
        act.pull_in_volts,
        config.safety.pull_in_margin,
        (1 << board.dac_bits) - 1,
    )


class RackState:
    """The shared facts of one controller: flags, boards, actuators, the journal and events."""

    def __init__(self, config: Config, rack: Rack, journal: Journal) -> None:
        self.config = config
        self.rack = rack
        self.journal = journal
        self.log = get_logger(component="controller")
        self.armed = False
        self.estopped = False
        self.listeners: list[Listener] = []
        self.boards = {b.id: BoardState(b, rack.drivers[b.id]) for b in config.rack.boards}
        self.actuators: dict[str, ActuatorState] = {}
        for act in config.chip.actuators:
            board = config.rack.board(act.output.board)
            table = load_calibration(act.calibration)
            limit = _channel_limit(config, act, board)
            amap = ActuatorMap(act.id, act.kind, table, limit.hard_limit_volts)
            self.actuators[act.id] = ActuatorState(act, board, amap, limit, table.version, table.origin)
        self.limits = {aid: a.limit for aid, a in self.actuators.items()}
        self.gates = {g.id: g for g in config.chip.gates}

    def emit(self, kind: str, client: str | None = None, **detail: Any) -> None:
        """Journal an event and tell the listeners (telemetry)."""
        self.journal.event(
            kind,
            client=client,
            board=detail.get("board"),
            actuator=detail.get("actuator"),
            **{k: v for k, v in detail.items() if k not in ("board", "actuator")},
        )
        for listener in list(self.listeners):
            listener(kind, detail)

    def code_of(self, actuator_id: str) -> int:
        act = self.actuators[actuator_id]
        return self.boards[act.board.id].codes[act.config.output.index]

    def current_codes(self, actuator_ids: list[str] | None = None) -> dict[str, int]:
        """Codes last seen latched, per actuator (one read of each board's record)."""
        ids = list(self.actuators) if actuator_ids is None else actuator_ids
        held = {b: s.codes for b, s in self.boards.items()}
        return {aid: held[self.actuators[aid].board.id][self.actuators[aid].config.output.index] for aid in ids}

    def unavailable(self, board_ids: set[str]) -> dict[str, str]:
        """Of ``board_ids``, those motion may not use now, each with the reason."""
        out = {}
        for board_id in sorted(board_ids):
            state = self.boards[board_id]
            if state.faulted:
                out[board_id] = "faulted or unreachable"
            elif state.needs_restore:
                out[board_id] = "waiting for restore"
            elif state.doubt is not None:
                out[board_id] = f"outputs in doubt ({state.doubt})"
        return out

    def forget_values(self, board_id: str, channels: set[int] | None = None) -> None:
        """Logical values stop meaning anything on outputs that changed under us."""
        for act in self.actuators.values():
            if act.board.id == board_id and (channels is None or act.config.output.index in channels):
                act.value = None

    def record(self, actuator_id: str, code: int, value: float | None, ts: float | None = None) -> TargetRecord:
        act = self.actuators[actuator_id]
        return TargetRecord(
            actuator_id,
            act.board.id,
            act.config.output.index,
            code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits),
            code,
            value,
            act.calibration_version,
            time.time() if ts is None else ts,
        )

    def describe(self, actuator_id: str) -> dict[str, Any]:
        act = self.actuators[actuator_id]
        code = self.code_of(actuator_id)
        return {
            "kind": act.config.kind,
            "board": act.board.id,
            "channel": act.config.output.index,
            "volts": code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits),
            "code": code,
            "limit_v": act.limit.hard_limit_volts,
            "value": act.value,
        }

    def live_outputs(self) -> tuple[int, float]:
        """How many wired outputs are above zero, and the highest of them in volts."""
        count, highest = 0, 0.0
        held = {b: st.codes for b, st in self.boards.items()}
        for act in self.actuators.values():
            code = held[act.board.id][act.config.output.index]
            if code:
                count += 1
                highest = max(highest, code_to_volts(code, act.board.full_scale_volts, act.board.dac_bits))
        return count, highest
