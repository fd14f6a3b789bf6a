"""Design-nominal calibration tables, computed from the simulator's nominal device model.

Before anyone has measured a chip, the daemon still needs a table per actuator. These tables
come from the device model without fabrication spread or charging, and say so in their
``origin`` and ``note``: on the simulated chip (as on a real one) they are wrong by the spread,
which is what a calibration procedure later fixes.

The files are written in the daemon's calibration format (docs/configuration.md); the simulator
writes them as any outside tool would, without importing the daemon.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import yaml

from meshsim.devices import comb_arrays, plate_arrays
from meshsim.params import SimParams
from meshsim.scenario import Scenario

FORMAT = "meshwarden-calibration/1"
NOTE = (
    "computed from the simulator's nominal device model (no fabrication spread, no dielectric charging); not measured"
)


def _monotone_prefix(volts: np.ndarray, values: np.ndarray) -> tuple[list[float], list[float]]:
    """The leading part of the curve over which values strictly increase."""
    keep = 1
    while keep < len(values) and values[keep] > values[keep - 1]:
        keep += 1
    return [round(float(v), 6) for v in volts[:keep]], [float(f"{v:.9g}") for v in values[:keep]]


def nominal_tables(
    scenario: Scenario, params: SimParams, step_volts: float = 0.5, version: str = "nominal-1"
) -> list[dict[str, Any]]:
    """One calibration document per actuator, over 0 V to the board's full scale or just below the
    device's instability, whichever is lower."""
    boards = {b.id: b for b in scenario.boards}
    plate = plate_arrays(params.coupler, 1)
    comb = comb_arrays(params.phase, 1)
    wavelength = params.laser.wavelength_m
    out = []
    for act in scenario.actuators:
        fs = boards[act.board].full_scale_volts
        if act.kind == "coupler":
            top = min(fs, 0.98 * float(plate.pull_in_volts[0]))
            volts = np.arange(0.0, top + 1e-9, step_volts)
            values = plate.kappa(plate.equilibrium(volts))
        else:
            top = min(fs, 0.98 * float(comb.lateral_snap_volts[0]))
            volts = np.arange(0.0, top + 1e-9, step_volts)
            values = comb.phase(comb.equilibrium(volts), wavelength)
        v, y = _monotone_prefix(volts, np.asarray(values))
        out.append(
            {
                "format": FORMAT,
                "actuator": act.id,
                "kind": act.kind,
                "version": version,
                "origin": "design-nominal",
                "note": NOTE,
                "volts": v,
                "values": y,
            }
        )
    return out


def write_nominal_tables(scenario: Scenario, params: SimParams, directory: Path, step_volts: float = 0.5) -> int:
    """Write one file per actuator into ``directory``; return how many were written."""
    directory.mkdir(parents=True, exist_ok=True)
    tables = nominal_tables(scenario, params, step_volts)
    for doc in tables:
        text = yaml.safe_dump(doc, sort_keys=False, default_flow_style=None, width=100)
        (directory / f"{doc['actuator']}.yaml").write_text(text, encoding="utf-8")
    return len(tables)
