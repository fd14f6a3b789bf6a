"""Random fault draws on the demo chip (120 actuators on two boards, 48 monitors, fabrication spread,
static phases, crosstalk and drift), at a random operating point per draw.

    python -m tests.procedures.scan_demo_draws --draws 30 --seed 77

On this chip no oracle short of the physics says which actuator a monitor can see, so the rules are:
no healthy part is ever flagged (``no_response``, ``driver_fault``, ``drifted``; monitors anything but
``ok``); a driver fault is always found (the sense check needs no light); a stuck or open-wire
actuator is ``no_response`` or ``unobservable``, never ``ok`` (how many were found is counted); a
saturated monitor is found; a noisy monitor (1e-6 to 1e-5 A rms, above the 1 % of its light a lit
monitor may wander by) is found; a dead monitor is found where the simulator's own tap power says
light reaches it, and ``ok`` is accepted where it does not.
"""

from __future__ import annotations

import argparse
import asyncio
import shutil
import tempfile
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import yaml

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_run import run_scan
from meshwarden.writelog import check_board_log

REPO = Path(__file__).resolve().parents[2]
FLAGS = ("no_response", "driver_fault", "drifted")


async def _one(config_dir: Path, rng: np.random.Generator, tally: Counter[str]) -> list[str]:
    config = load_config(config_dir / "demo.yaml")
    sim = yaml.safe_load((config_dir / "demo" / "simulator.yaml").read_text(encoding="utf-8"))
    lattice = sim["lattice"]
    topology = LatticeTopology.from_lattice(
        lattice["modes"], lattice["columns"], lattice["taps"], sim["laser"]["input_modes"]
    )
    async with open_controller(config) as ctl:
        await ctl.arm()
        point = {f"{g}.kappa": float(rng.uniform(0.15, 0.85)) for g in ctl.gates}
        point |= {f"{g}.phase": float(rng.uniform(0.3, 6.0)) for g in ctl.gates}
        await ctl.set(point)
        rack = inprocess.get("demo")
        actuators, monitors = list(ctl.actuators), [m.id for m in config.chip.monitors]
        faults: dict[str, str] = {}
        for aid in rng.choice(actuators, size=int(rng.integers(1, 4)), replace=False):
            kind = str(rng.choice(("stuck", "open_wire", "dead_channel", "short")))
            faults[str(aid)] = kind
            act = ctl.actuators[str(aid)]
            if kind in ("stuck", "open_wire"):
                rack.inject(Fault(kind, str(aid)))
            else:
                target = f"{act.board.id}:{act.config.output.index}"
                rack.inject(Fault(kind, target, float(rng.uniform(0.3, 0.8)) if kind == "short" else 0.0))
        lit = dict(zip(monitors, rack.truth().tap_power_w > 1e-8, strict=True))  # > 10 nW: well above the noise
        for mon in rng.choice(monitors, size=int(rng.integers(0, 3)), replace=False):
            kind = str(rng.choice(("dead_monitor", "saturated_monitor", "noisy_monitor")))
            faults[str(mon)] = kind
            rack.inject(Fault(kind, str(mon), float(10 ** rng.uniform(-6, -5)) if kind == "noisy_monitor" else 0.0))
        report = await run_scan(ctl, owner="scan:demo", topology=topology)
        bad = []
        for board in ("b0", "b1"):
            bad += [str(v) for v in check_board_log(config, board, list(rack.board(board).write_log)).violations]
        if not report["outputs_restored"]:
            bad.append("outputs not restored")
    tally["frames"] += report["frames"]
    tally["actuators"] += len(report["actuators"])
    tally["most_frames"] = max(tally["most_frames"], report["frames"])
    for part, verdict in report["actuators"].items():
        got, kind = verdict["verdict"], faults.get(part)
        if kind in ("dead_channel", "short"):
            ok = got == "driver_fault"
        elif kind in ("stuck", "open_wire"):
            ok = got in ("no_response", "unobservable")
            tally["stuck_found" if got == "no_response" else "stuck_unobservable"] += 1
        else:
            ok = got not in FLAGS
            tally["healthy_actuators"] += 1
        if not ok:
            bad.append(f"{part} ({kind or 'healthy'}): {got} ({verdict['reason']})")
    for part, verdict in report["monitors"].items():
        got, kind = verdict["verdict"], faults.get(part)
        wanted = {"saturated_monitor": {"saturated"}, "noisy_monitor": {"noisy"}}.get(kind or "", {"ok"})
        if kind == "dead_monitor":
            wanted = {"dead"} if lit[part] else {"dead", "ok"}
        if not kind:
            tally["healthy_monitors"] += 1
        if got not in wanted:
            bad.append(f"{part} ({kind or 'healthy'}): {got} ({verdict['reason']})")
    return bad


def run_demo_draws(count: int, seed: int) -> dict[str, Any]:
    """``count`` draws on a copy of the demo configuration; problems and tallies."""
    rng = np.random.default_rng(seed)
    tally: Counter[str] = Counter()
    problems = []
    with tempfile.TemporaryDirectory() as tmp:
        config_dir = Path(tmp) / "config"
        shutil.copytree(REPO / "config", config_dir)
        for k in range(count):
            shutil.rmtree(Path(tmp) / "var", ignore_errors=True)  # a fresh journal: a fresh rack has nothing to restore
            try:
                problems += [f"draw {k}: {p}" for p in asyncio.run(_one(config_dir, rng, tally))]
            finally:
                inprocess.remove("demo")
    return {"draws": count, "problems": problems, **tally}


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=30)
    parser.add_argument("--seed", type=int, default=77)
    args = parser.parse_args()
    result = run_demo_draws(args.draws, args.seed)
    for line in result["problems"]:
        print(line)
    print({k: v for k, v in result.items() if k != "problems"}, f"{len(result['problems'])} problems")
    mean = result["frames"] / max(result["actuators"], 1)
    print(f"{mean:.3f} monitor frames per actuator on average, at most {result['most_frames'] / 120:.3f} in one scan")
