"""Random fault draws on the scan bench, and what an honest scan must say about each part.

Run as a script for the long measurement (``python -m tests.procedures.scan_draws --draws 60
--seed 4242``); the test suite runs a few draws from a seed of its own.

What is expected (derived here from the bench's layout, not from the scan's code):

* ``dead_channel`` / ``short`` on an actuator's channel -> ``driver_fault``;
* ``stuck`` / ``open_wire`` on a coupler or on the phase of gate ``a{i}`` -> ``no_response``;
  on the phase of ``b{i}`` (after the last coupler) -> ``unobservable``;
* a healthy actuator -> ``ok``; ``unobservable`` is accepted only where no judgement is possible:
  the phase of ``b{i}``, both output monitors of its block faulty, or a faulty actuator earlier on
  its light path in the same block (coupler before phase, gate a before gate b);
* a faulty actuator may likewise be ``unobservable`` only in those cases - never ``ok``;
* monitors: ``dead_monitor`` on an output -> ``dead`` (on an unlit dark tap it cannot be seen:
  ``ok`` accepted), ``saturated_monitor`` -> ``saturated``, ``noisy_monitor`` -> ``noisy``,
  healthy -> ``ok``.
"""

from __future__ import annotations

import argparse
import asyncio
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.procedures.scan_run import run_scan
from meshwarden.writelog import check_board_log
from tests.procedures.scan_bench import BLOCKS, OPERATING_POINT, bench_topology, write_scan_bench

ACTUATOR_FAULTS = ("stuck", "open_wire", "dead_channel", "short")
MONITOR_FAULTS = ("dead_monitor", "saturated_monitor", "noisy_monitor")
ORDER = ("c", "p")  # within a gate: coupler, then phase


def channel_of(actuator: str) -> int:
    """The bench's wiring: block i, gate a/b, coupler/phase -> channel 4i + 2(gate b) + (phase)."""
    block, gate, part = int(actuator[1]), actuator[0], actuator[2]
    return 4 * block + (2 if gate == "b" else 0) + (1 if part == "p" else 0)


def _upstream(first: str, second: str) -> bool:
    """first comes before second on the light path of one block (coupler a, phase a, coupler b)."""
    path = ["a{}c", "a{}p", "b{}c", "b{}p"]
    if first[1] != second[1]:
        return False
    block = first[1]
    names = [p.format(block) for p in path]
    return names.index(first) < names.index(second)


@dataclass
class Draw:
    """One random set of faults and what must follow."""

    faults: list[Fault]
    actuator_faults: dict[str, str] = field(default_factory=dict)
    monitor_faults: dict[str, str] = field(default_factory=dict)


def draw(rng: np.random.Generator) -> Draw:
    """One to three actuator faults and zero to two monitor faults, on parts drawn at random."""
    actuators = [f"{g}{i}{p}" for i in range(BLOCKS) for g in "ab" for p in ORDER]
    monitors = [f"{k}{i}{s}" for i in range(BLOCKS) for k, s in (("o", "t"), ("o", "b"), ("d", ""))]
    out = Draw([])
    for aid in rng.choice(actuators, size=int(rng.integers(1, 4)), replace=False):
        kind = str(rng.choice(ACTUATOR_FAULTS))
        out.actuator_faults[str(aid)] = kind
        if kind in ("dead_channel", "short"):
            value = float(rng.uniform(0.3, 0.8)) if kind == "short" else 0.0
            out.faults.append(Fault(kind, f"b0:{channel_of(str(aid))}", value))
        else:
            out.faults.append(Fault(kind, str(aid)))
    for mon in rng.choice(monitors, size=int(rng.integers(0, 3)), replace=False):
        kind = str(rng.choice(MONITOR_FAULTS))
        out.monitor_faults[str(mon)] = kind
        # extra noise 1e-7 .. 1e-6 A rms: above the 1 % of its light a lit monitor may wander by (drift, laser
        # noise: scans.optical_noise_rel), and ~1000x the detector's expected 1.1e-10 A (ADC-limited)
        value = float(10 ** rng.uniform(-7, -6)) if kind == "noisy_monitor" else 0.0
        out.faults.append(Fault(kind, str(mon), value))
    return out


def problems(d: Draw, report: dict[str, Any]) -> list[str]:
    """Every way the report departs from what the draw implies (empty: all found and classed right)."""
    bad = []
    faulty_outputs = {m for m in d.monitor_faults if m.startswith("o")}
    for aid, verdict in report["actuators"].items():
        got = verdict["verdict"]
        block = aid[1]
        blind = {f"o{block}t", f"o{block}b"} <= faulty_outputs
        shadowed = any(_upstream(f, aid) for f in d.actuator_faults)
        may_be_unseen = (aid.endswith("p") and aid.startswith("b")) or blind or shadowed
        kind = d.actuator_faults.get(aid)
        if kind in ("dead_channel", "short"):
            wanted = {"driver_fault"}
        elif kind in ("stuck", "open_wire"):
            wanted = {"unobservable"} if aid.startswith("b") and aid.endswith("p") else {"no_response"}
        else:
            wanted = {"unobservable"} if aid.startswith("b") and aid.endswith("p") else {"ok"}
        if may_be_unseen and "driver_fault" not in wanted:
            wanted = wanted | {"unobservable"}
        if got not in wanted:
            bad.append(f"{aid} ({kind or 'healthy'}): {got} ({verdict['reason']}), wanted {sorted(wanted)}")
    for mon, verdict in report["monitors"].items():
        got = verdict["verdict"]
        kind = d.monitor_faults.get(mon)
        wanted = {"dead_monitor": {"dead"}, "saturated_monitor": {"saturated"}, "noisy_monitor": {"noisy"}}.get(
            kind or "", {"ok"}
        )
        if kind == "dead_monitor" and mon.startswith("d"):
            wanted = {"ok"}  # no light reaches a dark tap: a dead one cannot be told apart
        if got not in wanted:
            bad.append(f"{mon} ({kind or 'healthy'}): {got} ({verdict['reason']}), wanted {sorted(wanted)}")
    return bad


async def scan_one(folder: Path, d: Draw) -> tuple[dict[str, Any], list[str]]:
    """Bring the bench to its operating point, inject the draw's faults, scan; report and rule problems."""
    path, rack = write_scan_bench(folder)
    config = load_config(path)
    try:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set(OPERATING_POINT)
            sim = inprocess.get(rack)
            before = len(sim.board("b0").write_log)
            for fault in d.faults:
                sim.inject(fault)
            initial = {a: int(ctl.describe(a)["code"]) for a in ctl.actuators}
            report = await run_scan(ctl, owner="scan:draw", topology=bench_topology())
            log = list(sim.board("b0").write_log)
            issues = [str(v) for v in check_board_log(config, "b0", log).violations]
            final = _last_codes(log, initial, ctl)
            issues += [f"{a} ends at code {final[a]}, began at {initial[a]}" for a in initial if final[a] != initial[a]]
            if len(log) == before:
                issues.append("the scan wrote nothing")
            return report, issues
    finally:
        inprocess.remove(rack)


def _last_codes(log: list[Any], initial: dict[str, int], ctl: Any) -> dict[str, int]:
    """Each actuator's code as the board's write log last set it."""
    codes = {ctl.actuators[a].config.output.index: c for a, c in initial.items()}
    for _, kind, first, values in log:
        if kind == "write":
            for k, value in enumerate(values):
                codes[first + k] = int(value)
    return {a: codes[ctl.actuators[a].config.output.index] for a in initial}


def run_draws(count: int, seed: int) -> dict[str, Any]:
    """``count`` draws from ``seed``: found, missed, false alarms, frames per actuator."""
    rng = np.random.default_rng(seed)
    failures: list[str] = []
    frames: list[float] = []
    faults = 0
    classed = {"found": 0, "excused": 0}
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(count):
            d = draw(rng)
            faults += len(d.faults)
            report, issues = asyncio.run(scan_one(Path(tmp) / f"draw{k}", d))
            frames.append(report["frames"] / len(report["actuators"]))
            for part in d.actuator_faults | d.monitor_faults:
                verdicts = report["actuators"] if part in report["actuators"] else report["monitors"]
                classed["excused" if verdicts[part]["verdict"] in ("unobservable", "ok") else "found"] += 1
            failures += [f"draw {k}: {p}" for p in problems(d, report) + issues]
    return {"draws": count, "faults": faults, **classed, "failures": failures, "frames_per_actuator": max(frames)}


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=60)
    parser.add_argument("--seed", type=int, default=4242)
    args = parser.parse_args()
    result = run_draws(args.draws, args.seed)
    for line in result["failures"]:
        print(line)
    print(
        f"{result['draws']} draws, {result['faults']} faults injected, {result['found']} found and classed, "
        f"{result['excused']} on parts no monitor could judge, {len(result['failures'])} problems, "
        f"at most {result['frames_per_actuator']:.3f} monitor frames per actuator"
    )
