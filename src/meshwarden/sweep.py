"""Sweeps for experiment scripts and the command line: step settings over ranges, read the
monitors at each point, keep every row.

    from meshwarden.client import Client
    from meshwarden.sweep import Axis, run_sweep, write_csv

    with Client() as mw:
        rows = run_sweep(mw, [Axis("p05", 0.0, 6.28, 25)], monitors=["m37", "m38"], average=4)
    write_csv("phase-scan.csv", rows)

Several axes make a grid: the first axis changes slowest. Every point is an ordinary `set`
through the daemon, so the guard checks it (limits, steps, dwell, leases) and the journal records
it; a refused point raises the refusal, and the rows measured before it are in ``rows`` when the
caller passes its own list. A stop request (``should_stop`` returning true, or Ctrl-C in the
command line) ends it between points.
"""

from __future__ import annotations

import csv
import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from meshwarden.client import Client
from meshwarden.errors import MeshwardenError


@dataclass(frozen=True)
class Axis:
    """One setting stepped from ``start`` to ``stop`` (both included) in ``points`` points."""

    name: str
    start: float
    stop: float
    points: int

    def values(self) -> list[float]:
        if self.points < 1 or not (math.isfinite(self.start) and math.isfinite(self.stop)):
            raise MeshwardenError(f"sweep axis {self.name}: needs finite ends and at least one point")
        if self.points == 1:
            return [self.start]
        step = (self.stop - self.start) / (self.points - 1)
        return [self.start + i * step for i in range(self.points - 1)] + [self.stop]


def parse_axis(spec: str) -> Axis:
    """``ID=START:STOP:POINTS`` -> Axis."""
    name, sep, rest = spec.partition("=")
    parts = rest.split(":")
    try:
        if not sep or not name or len(parts) != 3:
            raise ValueError
        axis = Axis(name.strip(), float(parts[0]), float(parts[1]), int(parts[2]))
    except ValueError:
        raise MeshwardenError(f"sweep: expected ID=START:STOP:POINTS (e.g. p05=0:6.28:25), got {spec!r}") from None
    axis.values()  # refuse NaN, infinities and empty axes before anything moves
    return axis


def grid(axes: Sequence[Axis]) -> list[dict[str, float]]:
    """Every point of the grid, the first axis slowest."""
    names = [a.name for a in axes]
    if len(set(names)) != len(names):
        raise MeshwardenError("sweep: an axis is given twice")
    return [dict(zip(names, combo, strict=True)) for combo in itertools.product(*(a.values() for a in axes))]


Progress = Callable[[int, int], None]


def run_sweep(
    client: Client,
    axes: Sequence[Axis],
    monitors: Sequence[str] | None = None,
    *,
    average: int = 1,
    integration_s: float = 1e-3,
    volts: bool = False,
    progress: Progress | None = None,
    should_stop: Callable[[], bool] | None = None,
    rows: list[dict[str, Any]] | None = None,
) -> list[dict[str, Any]]:
    """Set each point through the daemon, read the monitors, return one row per point:
    the requested settings, the volts applied to each actuator, and each monitor's watts
    (appended to ``rows`` as they are measured, when given)."""
    points = grid(axes)
    rows = [] if rows is None else rows
    for index, point in enumerate(points):
        if should_stop is not None and should_stop():
            break
        applied = client.set(point, volts=volts)["applied"]
        reading = client.monitors(average=average, integration_s=integration_s)
        chosen = list(monitors) if monitors else sorted(reading)
        missing = [m for m in chosen if m not in reading]
        if missing:
            raise MeshwardenError(f"sweep: no monitor '{missing[0]}' (known: {', '.join(sorted(reading))})")
        row: dict[str, Any] = {"point": index, **point}
        row.update({f"{aid}_volts": a["volts"] for aid, a in sorted(applied.items())})
        row.update({f"{m}_watts": reading[m]["watts"] for m in chosen})
        rows.append(row)
        if progress is not None:
            progress(index + 1, len(points))
    return rows


def write_csv(path: str | Path, rows: Sequence[dict[str, Any]]) -> Path:
    """Rows as CSV with a header line (column order of the first row)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", newline="", encoding="utf-8") as out:
        if rows:
            writer = csv.DictWriter(out, fieldnames=list(rows[0]))
            writer.writeheader()
            writer.writerows(rows)
    return path
