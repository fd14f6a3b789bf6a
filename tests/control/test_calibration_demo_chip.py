"""Calibration of the demo chip (120 actuators on two boards, fabrication spread, splitting errors,
crosstalk, phase-dependent loss) on a seed of its own, checked against the simulator's truth."""

from __future__ import annotations

import asyncio
import itertools
import shutil
from pathlib import Path

import numpy as np
import yaml

from meshsim import inprocess
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.procedures.calibrate_run import calibration_job
from meshwarden.writelog import check_board_log
from tests.conftest import REPO, route_light_script
from tests.control.conftest import run

SEED = 5150  # neither the demo's nor one the procedure was worked out on (4242, 777 were)
RACK = "caldemo"


def _demo_chip(folder: Path) -> Path:
    """The demo configuration with the simulator drawn from SEED and its drift off (a drifting
    chip would move while it is checked), the dielectric charging too: a routing coupler held at
    cross (about 38 V) through the run charges by 2 % of that with a 300 s time constant, and
    right after a 30 s run reads 0.007-0.008 low at the steep middle of its curve until it
    relaxes, in proportion to the run's wall-clock length (longer on a loaded machine)."""
    sim = yaml.safe_load((REPO / "config" / "demo" / "simulator.yaml").read_text(encoding="utf-8"))
    sim["seed"] = SEED
    sim["drift"].update(random_walk_rad_per_sqrt_s=0.0, temperature_steps=[], temperature_step_interval_s=0)
    sim["coupler"]["charging_fraction"] = sim["phase"]["charging_fraction"] = 0.0
    (folder / "sim.yaml").write_text(yaml.safe_dump(sim), encoding="utf-8")
    rack = yaml.safe_load((REPO / "config" / "demo" / "rack.yaml").read_text(encoding="utf-8"))
    for board in rack["boards"]:
        board["url"] = f"meshsim://{RACK}/{board['id']}?config={folder}/chip-test.yaml"
    (folder / "rack.yaml").write_text(yaml.safe_dump(rack), encoding="utf-8")
    shutil.copytree(REPO / "config" / "demo" / "calibration", folder / "nominal")
    path = folder / "chip-test.yaml"
    path.write_text(
        "rack: !include rack.yaml\n"
        f"chip: !include {REPO / 'config' / 'demo' / 'chip.yaml'}\n"
        "calibration: {directory: nominal}\n"
        "journal: {path: journal.sqlite}\n"
        "simulator: !include sim.yaml\n",
        encoding="utf-8",
    )
    return path


def test_demo_chip_calibrates_to_its_truth(tmp_path: Path) -> None:
    """After one calibration: every part the light reaches is measured and passes its gate, in
    at most 20 frames per actuator of the chip, its progress counted to one end; couplers set all at once to random ratios all
    land within 0.01 of the truth and phase steps within 0.02 rad (the issue's target); the route
    the calibrated ranges choose puts at least 96.5 % of the light at the chosen output (the
    truth's own tap powers); every write kept the rules."""
    config = load_config(_demo_chip(tmp_path))
    route = route_light_script()
    rng = np.random.default_rng(9)
    ticks: list[tuple[int, int, str]] = []

    async def scenario() -> tuple[dict, list[float], list[float], float]:
        async with open_controller(config) as ctl:
            await ctl.arm()
            report = await calibration_job(ctl, progress=lambda done, total, what: ticks.append((done, total, what)))
            rack = inprocess.get(RACK)
            gate = {g: i for i, g in enumerate(rack.truth().gate_ids)}
            ok = [a for a, o in report["actuators"].items() if o["status"] == "ok"]
            couplers = [a for a in ok if a.startswith("c")]
            kappa_errors = []
            for _ in range(3):
                request = {}
                for a in couplers:
                    low, high = ctl.actuators[a].map.reachable()
                    request[a] = float(rng.uniform(max(low, 0.05), min(high, 0.95)))
                await ctl.set(request)
                await asyncio.sleep(0.01)  # ringdown: tens of microseconds (standard)
                truth = rack.truth()
                kappa_errors += [abs(float(truth.kappa[gate["g" + a[1:]]]) - v) for a, v in request.items()]
            await ctl.set({a: 0.0 for a in couplers}, volts=True)
            phase_errors = []
            for a in (a for a in ok if a.startswith("p")):
                wanted = rng.uniform(0.0, 2 * np.pi, 2)
                seen = []
                for value in wanted:
                    await ctl.set({a: float(value)})
                    await asyncio.sleep(0.003)
                    seen.append(float(rack.truth().mesh_phase_rad[gate["g" + a[1:]]]))
                step = (seen[1] - seen[0]) - (wanted[1] - wanted[0])
                phase_errors.append(abs((step + np.pi) % (2 * np.pi) - np.pi))
                await ctl.set({a: 0.0}, volts=True)
            reach = {a: list(act.map.reachable()) for a, act in ctl.actuators.items()}
            path = route.path_to(5, reachable=reach)  # type: ignore[attr-defined]
            await ctl.set({"c" + g[1:]: min(1.0, reach["c" + g[1:]][1]) for g in path})
            await asyncio.sleep(0.01)
            truth = rack.truth()
            monitors = list(rack.chip.monitor_ids)
            outputs = [float(truth.tap_power_w[monitors.index(f"m{32 + k}")]) for k in range(16)]
            await ctl.disarm()
            return report, kappa_errors, phase_errors, outputs[5] / sum(outputs)

    try:
        report, kappa_errors, phase_errors, share = run(scenario())
        statuses = [o["status"] for o in report["actuators"].values()]
        assert statuses.count("ok") == 35 and statuses.count("failed") == 0, report["actuators"]
        assert report["frames"] / len(statuses) <= 20  # the goal: frames per actuator of the chip
        # Progress counts the second pass too: one total, never backwards, done only at the end.
        assert len({total for _, total, _ in ticks}) == 1 and ticks[-1] == (ticks[-1][1], ticks[-1][1], "")
        assert all(a[0] <= b[0] for a, b in itertools.pairwise(ticks))
        assert all(done < total for done, total, _ in ticks[:-1])
        errors = np.array(kappa_errors)
        assert float(errors.max()) <= 0.01, sorted(errors)[-6:]
        assert max(phase_errors) <= 0.02, phase_errors
        assert share >= 0.965, share
        for board in ("b0", "b1"):
            result = check_board_log(config, board, list(inprocess.get(RACK).board(board).write_log))
            assert not result.violations, result.violations[:5]
    finally:
        inprocess.remove(RACK)
