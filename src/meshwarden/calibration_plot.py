"""Figures of a calibration version: `meshwarden calibrate --plot DIR`, `calibration show V --plot DIR`.

Input: the ``calibration_show`` reply with ``sweeps`` (manifest, sweeps, layout, gates). Output:
one PNG per swept actuator (``<ID>.png``: the measured points and the fit above, measured minus
fitted below, status and reason in the title) and one of the lattice (``overview.png``), each
half gate coloured by its residual as a fraction of the limit its gate allows, so couplers
(residual in kappa) and phase shifters (residual in fringe power) share one scale; failed and
unobservable actuators are marked apart from the colour scale.

The preparation (:func:`actuator_panels`, :func:`overview_cells`) is pure and is what the tests
check; the drawing takes a pyplot module so that matplotlib stays optional.
"""

from __future__ import annotations

import math
import re
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from meshwarden.errors import MeshwardenError
from meshwarden.lattice_plot import PatchStyle, draw_lattice, save_figure

OVERVIEW = "overview"
CURVE_POINTS = 200  # a fitted fringe is drawn as this many points across the sweep
RESIDUAL_SCALE_TOP = 1.5  # the colour scale runs to 1.5 x the gate's limit (darker is worse)
QUANTITY_LABELS = {"kappa": "coupling ratio kappa", "power_w": "fringe taps' power (W)"}
STATUS_STYLES: dict[str, PatchStyle] = {
    "failed": {"facecolor": "#ffcdd2", "edgecolor": "#d32f2f", "hatch": "xx", "linewidth": 1.5},
    "unobservable": {"facecolor": "#9e9e9e", "edgecolor": "#616161"},
    "no_points": {"facecolor": "#ffffff", "edgecolor": "#616161", "hatch": ".."},
    "not_measured": {"facecolor": "#ffffff", "edgecolor": "#bdbdbd"},
}
_SAFE = re.compile(r"[^A-Za-z0-9_.-]")


@dataclass(frozen=True)
class ActuatorPanel:
    """What one actuator's figure shows: measured points, the fit, and measured minus fitted."""

    actuator: str
    file_name: str
    quantity: str
    title: str
    volts: tuple[float, ...]
    measured: tuple[float, ...]
    fitted: tuple[float | None, ...]
    residual_volts: tuple[float, ...]  # the points the fit used
    residuals: tuple[float, ...]  # measured minus fitted there
    curve_volts: tuple[float, ...]
    curve_values: tuple[float, ...]
    curve_label: str


@dataclass(frozen=True)
class OverviewCell:
    """One actuator's fill in the overview: its residual share of the gate's limit, or its status."""

    status: str
    residual_of_limit: float | None


def file_names(actuators: list[str]) -> tuple[dict[str, str], str]:
    """PNG names per actuator (its id, characters unsafe in a file name replaced) and the overview's,
    which never collides with an actuator's."""
    names = {a: f"{_SAFE.sub('_', a)}.png" for a in actuators}
    overview = f"{OVERVIEW}.png"
    while overview in names.values():
        overview = "_" + overview
    return names, overview


def _outcomes(shown: dict[str, Any]) -> dict[str, dict[str, Any]]:
    manifest = shown.get("manifest") or {}
    outcomes: dict[str, dict[str, Any]] = manifest.get("actuators") or {}
    return outcomes


def actuator_panels(shown: dict[str, Any]) -> tuple[list[ActuatorPanel], list[str]]:
    """A panel per swept actuator, and a line for each actuator of the version that gets no figure."""
    version = shown.get("version", "")
    outcomes = _outcomes(shown)
    sweeps = shown.get("sweeps")
    if sweeps is None:
        why = (
            "the configuration's own tables" if not shown.get("manifest") else "it was written before sweeps were kept"
        )
        return [], [f"version {version} has no measured points ({why}): no per-actuator figures, only the overview"]
    names, _ = file_names(sorted(set(outcomes) | set(sweeps)))
    panels, notes = [], []
    for actuator in sorted(set(outcomes) | set(sweeps)):
        outcome = outcomes.get(actuator, {})
        sweep = sweeps.get(actuator)
        if not sweep:
            why = f"{outcome.get('status', 'not measured')}: {outcome.get('reason') or 'no sweep'}"
            notes.append(f"no figure for {actuator}: no measured points ({why})")
            continue
        panels.append(_panel(actuator, names[actuator], version, outcome, sweep))
    return panels, notes


def _panel(
    actuator: str, file_name: str, version: str, outcome: dict[str, Any], sweep: dict[str, Any]
) -> ActuatorPanel:
    volts = [float(v) for v in sweep["volts"]]
    measured = [math.nan if m is None else float(m) for m in sweep["measured"]]
    fitted = [None if f is None else float(f) for f in sweep.get("fitted") or [None] * len(volts)]
    used = [(v, m - f) for v, m, f in zip(volts, measured, fitted, strict=True) if f is not None]
    curve_volts, curve_values, label = _curve(sweep, volts)
    status = outcome.get("status", "?")
    reason = outcome.get("reason") or ""
    title = f"{actuator} ({version}): {status}" + (f": {reason}" if reason else "")
    return ActuatorPanel(
        actuator=actuator,
        file_name=file_name,
        quantity=str(sweep["quantity"]),
        title=textwrap.fill(title, 90),
        volts=tuple(volts),
        measured=tuple(measured),
        fitted=tuple(fitted),
        residual_volts=tuple(v for v, _ in used),
        residuals=tuple(r for _, r in used),
        curve_volts=tuple(curve_volts),
        curve_values=tuple(curve_values),
        curve_label=label,
    )


def _curve(sweep: dict[str, Any], volts: list[float]) -> tuple[list[float], list[float], str]:
    """The fit as a line: a coupler's monotone table as stored; a fringe redrawn from its parameters."""
    model = sweep.get("model")
    if not model:
        return [], [], ""
    if sweep["quantity"] == "kappa":
        return [float(v) for v in model["volts"]], [float(k) for k in model["kappa"]], "fitted table"
    from meshwarden.procedures.fringe import fringe_power

    grid = np.linspace(0.0, max(volts), CURVE_POINTS)
    return [float(v) for v in grid], [float(p) for p in fringe_power(grid, **model)], "fitted fringe"


def overview_cells(shown: dict[str, Any]) -> dict[str, OverviewCell]:
    """Per actuator of the version: ok and failed with a fit carry their residual's share of the
    limit; unobservable, and anything without stored points, carry only their status."""
    sweeps = shown.get("sweeps") or {}
    cells = {}
    for actuator, outcome in _outcomes(shown).items():
        status = str(outcome.get("status", "?"))
        share = (sweeps.get(actuator) or {}).get("residual_of_limit")
        if status == "ok" and share is None:
            status = "no_points"
        cells[actuator] = OverviewCell(status, None if share is None else float(share))
    return cells


# ---------------------------------------------------------------- drawing (needs a pyplot module)


def write_plots(plt: Any, directory: Path, shown: dict[str, Any]) -> tuple[list[Path], list[str]]:
    """Draw every figure into ``directory`` (made if missing); the files written and the notes."""
    try:
        directory.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeshwardenError(f"cannot make the plot folder {directory}: {exc}") from None
    panels, notes = actuator_panels(shown)
    _, overview_name = file_names([p.actuator for p in panels])
    written = []
    for panel in panels:
        written.append(save_figure(plt, draw_actuator(plt, panel), directory / panel.file_name))
    written.append(save_figure(plt, draw_overview(plt, shown), directory / overview_name))
    return written, notes


def draw_actuator(plt: Any, panel: ActuatorPanel) -> Any:
    """Measured points and the fit above; measured minus fitted (the points the fit used) below."""
    figure, (top, bottom) = plt.subplots(2, 1, sharex=True, figsize=(7, 6), height_ratios=(3, 2))
    used = [f is not None for f in panel.fitted]
    top.plot(
        [v for v, u in zip(panel.volts, used, strict=True) if u],
        [m for m, u in zip(panel.measured, used, strict=True) if u],
        "o",
        color="#1976d2",
        label="measured",
    )
    if not all(used):
        top.plot(
            [v for v, u in zip(panel.volts, used, strict=True) if not u],
            [m for m, u in zip(panel.measured, used, strict=True) if not u],
            "o",
            mfc="none",
            color="#1976d2",
            label="measured, not used by the fit",
        )
    if panel.curve_volts:
        step = "post" if panel.quantity == "kappa" else None
        if step:
            top.step(panel.curve_volts, panel.curve_values, where=step, color="#f57c00", label=panel.curve_label)
        else:
            top.plot(panel.curve_volts, panel.curve_values, "-", color="#f57c00", label=panel.curve_label)
    top.set_ylabel(QUANTITY_LABELS.get(panel.quantity, panel.quantity))
    top.legend(fontsize=7)
    top.set_title(panel.title, fontsize=8)
    bottom.axhline(0.0, color="#9e9e9e", linewidth=0.8)
    bottom.plot(panel.residual_volts, panel.residuals, "o", color="#d32f2f")
    bottom.set_ylabel("measured - fitted")
    bottom.set_xlabel("volts (V)")
    figure.tight_layout()
    return figure


def draw_overview(plt: Any, shown: dict[str, Any]) -> Any:
    """The lattice, each half gate coloured by its residual's share of its gate's limit."""
    cells = overview_cells(shown)
    colours = plt.get_cmap("viridis_r")
    norm = plt.Normalize(0.0, RESIDUAL_SCALE_TOP)

    def style(actuator: str) -> PatchStyle:
        cell = cells.get(actuator)
        if cell is None:
            return STATUS_STYLES["not_measured"]
        if cell.status in ("unobservable", "no_points") or cell.residual_of_limit is None:
            return STATUS_STYLES.get(cell.status, STATUS_STYLES["failed"])
        fill = {"facecolor": colours(norm(min(cell.residual_of_limit, RESIDUAL_SCALE_TOP)))}
        return {**STATUS_STYLES["failed"], **fill} if cell.status == "failed" else {**fill, "edgecolor": "#424242"}

    figure, axes = plt.subplots(figsize=(11, 6))
    draw_lattice(plt, axes, shown.get("layout"), shown.get("gates") or {}, style, unplaced=sorted(cells))
    mappable = plt.cm.ScalarMappable(norm=norm, cmap=colours)
    figure.colorbar(mappable, ax=axes, label="rms residual / its gate's limit (1 = at the limit)")
    handles = [plt.Rectangle((0, 0), 1, 1, **STATUS_STYLES[s]) for s in STATUS_STYLES]
    labels = [
        "failed (hatched; fill: residual if fitted)",
        "unobservable",
        "no points stored",
        "not in this version",
    ]
    axes.legend(handles, labels, loc="upper left", bbox_to_anchor=(0.0, -0.08), ncol=4, fontsize=7)
    axes.set_title(f"calibration {shown.get('version', '')}: residuals")
    figure.tight_layout()
    return figure
