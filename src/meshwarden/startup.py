"""What happens at start, before the controller owns a board: bring it up, then decide adoption.

Bring-up runs on the board's own thread and writes no output: identify (and refuse a board that
is not the one the configuration describes), configure the watchdog, select the monitor gains,
read the status and every output code. Adoption is a pure decision on what was read and what
the journal says (rule 5 of the design: a restart never jumps an output).
"""

from __future__ import annotations

from dataclasses import dataclass

from meshwarden.config.model import ChipConfig
from meshwarden.drivers.base import BoardDriver, BoardIdentity
from meshwarden.errors import MeshwardenError
from meshwarden.journal import TargetRecord


@dataclass(frozen=True)
class BoardFound:
    identity: BoardIdentity
    codes: tuple[int, ...]
    watchdog_tripped: bool


def bring_up(driver: BoardDriver, chip: ChipConfig) -> BoardFound:
    """Open, check and configure one board; read its outputs. Never writes an output."""
    board = driver.config
    driver.open()
    identity = driver.identify()
    expected = (board.outputs, board.monitor_inputs, board.dac_bits, round(board.full_scale_volts, 3))
    found = (identity.outputs, identity.monitor_inputs, identity.dac_bits, round(identity.full_scale_volts, 3))
    if expected != found:
        raise MeshwardenError(
            f"board {board.id} reports outputs/inputs/DAC bits/full scale {found}, the configuration says {expected}"
        )
    driver.configure_watchdog(board.watchdog.timeout_s, board.watchdog.action)
    gains = [round(g) for g in board.monitor_gains_ohms]
    indices = [0] * board.monitor_inputs
    for mon in chip.monitors:
        if mon.input.board == board.id and round(mon.transimpedance_ohms) in gains:
            indices[mon.input.index] = gains.index(round(mon.transimpedance_ohms))
    if board.monitor_inputs:
        driver.set_monitor_gains(0, tuple(indices))
    tripped = driver.status().watchdog_tripped
    return BoardFound(identity, driver.read_codes(0, board.outputs), tripped)


@dataclass(frozen=True)
class Adoption:
    """The verdict on one board: ``kind`` is the journal event to record."""

    kind: str  # adopted | board_reset_detected | watchdog_tripped | adoption_mismatch
    needs_restore: bool
    channels: tuple[int, ...] = ()  # outputs that differ from the journal


def journaled_codes(board_id: str, outputs: int, journaled: dict[str, TargetRecord]) -> list[int]:
    """Every output's last journaled code (0 where the journal has none)."""
    expected = [0] * outputs
    for record in journaled.values():
        if record.board == board_id and record.channel < outputs:
            expected[record.channel] = record.code
    return expected


def adopt(found: BoardFound, expected: list[int], journaled_boot: int | None) -> Adoption:
    """Adopt a board only if it was not reset, its watchdog did not act, and it holds exactly the
    journaled codes; otherwise its outputs stay as found and it waits for ``restore``."""
    needs = any(expected)
    if journaled_boot is not None and found.identity.boot_count != journaled_boot:
        return Adoption("board_reset_detected", needs)
    if found.watchdog_tripped:
        return Adoption("watchdog_tripped", needs)
    if list(found.codes) == expected:
        return Adoption("adopted", False)
    differ = tuple(i for i, (a, b) in enumerate(zip(found.codes, expected, strict=True)) if a != b)
    return Adoption("adoption_mismatch", needs, differ)


def stop_never_reached(board_id: str, found: BoardFound, journaled: dict[str, TargetRecord]) -> bool:
    """Whether an emergency stop before this start never reached the board: every journaled output
    of it is still read as zeroed by the stop's marker (none recorded since: the stop journals zeros
    for each board it reached, and so does a zero confirmed later), and the board still holds a
    code the stop took away. That stop is not over: the board's zero is still due."""
    records = [r for r in journaled.values() if r.board == board_id and r.channel < len(found.codes)]
    if not records or any(r.stopped_code is None for r in records):
        return False
    return any(r.stopped_code and found.codes[r.channel] for r in records)
