"""Run locks on the lock bench and measure them against the simulator's ground truth (tests and
scripts/bench share it).

The chip is observed after each dither sample's moves: at sample 0 of a window every dither is 0,
so the chip then shows each lock's centre. Figures:

* extremum locks (a minimum at the cross output, see :func:`_ports`): the rms distance of the gate's phase as the light sees it (``mesh_phase_rad``)
  from the nearest fringe extremum, 0 or pi (for two couplers of any ratio and no phase on the
  other arm, a Mach-Zehnder's outputs are extremal exactly there: |t1 t2 e^(i phi) - r1 r2|^2,
  standard); whether it is the held kind (more than half the light on the monitor for max, less
  for min); for min the extinction 10 log10((P_a + P_b) / P_a), power-averaged;
* fraction locks: the rms and largest error of P_a / (P_a + P_b) at the taps;
* max locks: the dither's cost, 1 - (mean power over every sample) / (mean power at the centres);
* a kick (a temperature step of the whole chip): loop periods until the error is back below a
  tenth of the kick;
* every board write checked against rules 1-3 (:func:`meshwarden.writelog.check_board_log`).
"""

from __future__ import annotations

import asyncio
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.procedures.lock_law import parse_hold
from meshwarden.procedures.locks import LockEngine, LockSpec
from meshwarden.writelog import BoardLogChecker
from tests.procedures.lockbench import MZIS, write_lock_bench


@dataclass
class LockFigures:
    hold: str
    state: str
    centre_rms_rad: float = math.nan
    centre_rms_with_kick_rad: float = math.nan  # the same, the kick's recovery included
    centre_max_rad: float = math.nan
    held_kind_ok: bool = True
    extinction_db: float = math.nan
    fraction_rms: float = math.nan
    fraction_max: float = math.nan
    dither_penalty: float = math.nan
    recovery_windows: float = math.nan
    wraps: int = 0


@dataclass
class RunFigures:
    locks: list[LockFigures]
    sample_period_s: float
    window_s: float
    windows: int
    writes: int
    violations: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {
            "sample_period_ms": self.sample_period_s * 1e3,
            "window_ms": self.window_s * 1e3,
            "loop_rate_hz": 1.0 / self.window_s if self.window_s else 0.0,
            "windows": self.windows,
            "writes": self.writes,
            "violations": len(self.violations),
            "locks": [vars(f) for f in self.locks],
        }


def _ports(i: int, kind: str) -> tuple[int, int]:
    """(held monitor, other output) of MZI i: a minimum is held at the cross output, which nulls for
    two equal couplers of any ratio (|t1 r2 e^(i phi) + r1 t2|^2 = 0 at phi = pi, standard); the bar
    output's floor is (1 - 2 kappa)^2, set by the couplers, not by the lock."""
    return (2 * i + 1, 2 * i) if kind == "min" else (2 * i, 2 * i + 1)


def _extremum_distance(phase: np.ndarray) -> np.ndarray:
    """Signed distance of each phase from the nearest of 0 and pi."""
    return np.asarray(np.angle(np.exp(2j * phase)) / 2.0)


def run_locks(
    folder: Path,
    holds: list[str],
    duration_s: float,
    *,
    kick_at_s: float | None = None,
    kick_rad: float = 0.5,
    settle_s: float = 1.0,
    recover_s: float = 1.5,
    time_scale: float = 1.0,
    integral_gain: float | None = None,
    drift: float = 0.05,
    phase_table_scale: float = 1.0,
) -> RunFigures:
    """Lock MZI i's phase to ``holds[i]`` for ``duration_s`` of simulated time; figures measured after
    ``settle_s``, leaving out ``recover_s`` after the kick (the kick has its own figure)."""
    steps = f"[[{kick_at_s}, {kick_rad}]]" if kick_at_s is not None else "[]"
    path, rack = write_lock_bench(
        folder, drift=drift, steps=steps, time_scale=time_scale, phase_table_scale=phase_table_scale
    )
    config = load_config(path)
    try:
        return asyncio.run(
            _run(config, rack, holds, duration_s, kick_at_s, kick_rad, settle_s, recover_s, integral_gain)
        )
    finally:
        inprocess.remove(rack)


async def _run(
    config: Any,
    rack: str,
    holds: list[str],
    duration_s: float,
    kick_at_s: float | None,
    kick_rad: float,
    settle_s: float,
    recover_s: float,
    integral_gain: float | None,
) -> RunFigures:
    async with open_controller(config) as ctl:
        await ctl.arm()
        await ctl.set({**{f"s{i}.kappa": 0.5 for i in range(MZIS)}, **{f"k{i}.kappa": 0.5 for i in range(MZIS)}})
        sim = inprocess.get(rack)
        gates = list(sim.truth().gate_ids)
        index = [gates.index(f"s{i}") for i in range(MZIS)]
        records: list[tuple[int, float, np.ndarray, np.ndarray]] = []

        def observe(n: int) -> None:
            truth = sim.truth()
            records.append((n, truth.time_s, truth.mesh_phase_rad[index].copy(), truth.tap_power_w.copy()))

        engine = LockEngine(ctl, on_sample=observe)
        start_s = sim.truth().time_s
        for i, text in enumerate(holds):
            hold = parse_hold(text)
            main, other = _ports(i, hold.kind)
            against = f"m{other:02d}" if hold.kind == "fraction" else None
            spec = LockSpec(f"L{i}", f"p{i}", f"m{main:02d}", hold, against=against, integral_gain=integral_gain)
            await engine.start(spec)
        # the board's log is drained into the checker as it grows (it keeps only the last 200,000 writes)
        log, checker = sim.board("b0").write_log, BoardLogChecker(config, "b0")
        wall_end = time.monotonic() + duration_s / sim.clock.time_scale
        while time.monotonic() < wall_end:
            await asyncio.sleep(0.05)
            checker.feed([log.popleft() for _ in range(len(log))])
        states = {name: lock.state for name, lock in engine.locks.items()}
        wraps = {name: lock.wraps_done for name, lock in engine.locks.items()}
        window_s = float(np.mean([lock.window_s for lock in engine.locks.values()]))
        await engine.close()
    check = checker.feed([log.popleft() for _ in range(len(log))])
    figures = [
        _figures(
            i,
            text,
            states[f"L{i}"],
            records,
            start_s,
            settle_s,
            kick_at_s,
            kick_rad,
            recover_s,
            window_s * sim.clock.time_scale,
        )
        for i, text in enumerate(holds)
    ]
    for i, one in enumerate(figures):
        one.wraps = wraps[f"L{i}"]
    return RunFigures(
        figures, engine.sample_period_s, window_s, engine.windows, check.writes, [str(v) for v in check.violations]
    )


def _figures(
    i: int,
    text: str,
    state: str,
    records: list[tuple[int, float, np.ndarray, np.ndarray]],
    start_s: float,
    settle_s: float,
    kick_at_s: float | None,
    kick_rad: float,
    recover_s: float,
    window_sim_s: float,
) -> LockFigures:
    hold = parse_hold(text)
    n = np.array([r[0] for r in records])
    t = np.array([r[1] for r in records]) - start_s
    phase = np.array([r[2][i] for r in records])
    taps = np.array([r[3] for r in records])
    main, other = _ports(i, hold.kind)
    pa, pb = taps[:, main], taps[:, other]
    kick = kick_at_s - start_s if kick_at_s is not None else math.inf
    measured = (t > settle_s) & ~((t >= kick) & (t < kick + recover_s))
    centre = measured & (n == 0)
    out = LockFigures(text, state)
    error = _extremum_distance(phase)
    if hold.extremum:
        out.centre_rms_rad = float(np.sqrt(np.mean(error[centre] ** 2)))
        everything = (t > settle_s) & (n == 0)
        out.centre_rms_with_kick_rad = float(np.sqrt(np.mean(error[everything] ** 2)))
        out.centre_max_rad = float(np.max(np.abs(error[centre])))
        share = pa[centre] / (pa[centre] + pb[centre])
        out.held_kind_ok = bool(np.all(share > 0.5)) if hold.kind == "max" else bool(np.all(share < 0.5))
        if hold.kind == "min":
            out.extinction_db = float(10 * np.log10(np.mean(pa[centre] + pb[centre]) / np.mean(pa[centre])))
        else:
            out.dither_penalty = float(1.0 - np.mean(pa[measured]) / np.mean(pa[centre]))
    else:
        assert hold.fraction is not None
        x = pa[centre] / (pa[centre] + pb[centre])
        out.fraction_rms = float(np.sqrt(np.mean((x - hold.fraction) ** 2)))
        out.fraction_max = float(np.max(np.abs(x - hold.fraction)))
    if kick_at_s is not None and hold.extremum:
        after = (n == 0) & (t >= kick)
        back = np.nonzero(np.abs(error[after]) < 0.1 * kick_rad)[0]
        if back.size:
            out.recovery_windows = float((t[after][back[0]] - kick) / window_sim_s)
    return out
