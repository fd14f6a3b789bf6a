"""Reading the chip through the rack: photodetector monitors and the boards' output sense.

Monitors on one board are read as one contiguous span per board, all boards at once, ``average``
times; the mean counts are converted by :func:`meshwarden.monitors.reading`. Counts become
volts, amps and watts only through the ADC full scale a board reported when it identified
itself; until every board involved has, the read is refused (no guessed full scale).
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Iterable

from meshwarden.config.model import ActuatorConfig, Config, MonitorConfig
from meshwarden.drivers.base import BoardDriver
from meshwarden.drivers.rack import Rack
from meshwarden.errors import FaultedRefused
from meshwarden.monitors import reading


def _monitor_reader(first: int, count: int, integration_s: float) -> Callable[[BoardDriver], tuple[int, ...]]:
    return lambda driver: driver.read_monitor_counts(first, count, integration_s)


async def acquire_monitors(
    rack: Rack, config: Config, adc_full_scale: dict[str, float], average: int, integration_s: float
) -> dict[str, dict[str, float]]:
    """Every monitor's mean reading over ``average`` acquisitions of ``integration_s`` each."""
    by_board: dict[str, list[MonitorConfig]] = {}
    for mon in config.chip.monitors:
        by_board.setdefault(mon.input.board, []).append(mon)
    unknown = sorted(b for b in by_board if b not in adc_full_scale)
    if unknown:
        raise FaultedRefused(
            f"monitors on board(s) {', '.join(unknown)}: the board has not identified itself yet, so its ADC "
            "full scale is unknown and no watts can be given",
            boards=unknown,
        )
    spans = {
        board_id: (min(m.input.index for m in mons), max(m.input.index for m in mons))
        for board_id, mons in by_board.items()
    }
    sums: dict[str, float] = {m.id: 0.0 for m in config.chip.monitors}
    for _ in range(max(1, average)):
        results = await asyncio.gather(
            *(rack.call(b, _monitor_reader(lo, hi - lo + 1, integration_s)) for b, (lo, hi) in spans.items())
        )
        for (board_id, (lo, _)), counts in zip(spans.items(), results, strict=True):
            for mon in by_board[board_id]:
                sums[mon.id] += counts[mon.input.index - lo]
    return {
        mon.id: reading(
            sums[mon.id] / max(1, average),
            mon,
            config.rack.board(mon.input.board).adc_bits,
            adc_full_scale[mon.input.board],
        )
        for mon in config.chip.monitors
    }


async def read_sense(rack: Rack, actuators: Iterable[ActuatorConfig]) -> dict[str, float]:
    """The boards' own measurement of every wired output, in volts (boards that fail are left out)."""
    results = await rack.each(lambda d: d.read_sense_volts(0, d.config.outputs))
    out = {}
    for act in actuators:
        result = results[act.output.board]
        if not isinstance(result, BaseException):
            out[act.id] = result[act.output.index]
    return out
