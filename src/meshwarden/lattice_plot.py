"""Drawing the chip's lattice for the command line's plots (scan verdicts, calibration residuals).

matplotlib is optional (the ``plot`` extra): :func:`load_pyplot` returns None when it is missing,
and the caller prints :data:`NO_MATPLOTLIB` and goes on; nothing here is imported by the daemon.
Every plot draws the lattice the same way, so a gate sits in the same place in a scan's figure and
in a calibration's: a gate is a box at its column and top mode, its coupler the left half and its
phase shifter the right half, each filled as the caller says; monitor taps are dots after the
column they follow. Without a layout (no ``chip.lattice``), the actuators fill a square grid.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from meshwarden.errors import MeshwardenError

NO_MATPLOTLIB = "meshwarden: --plot needs matplotlib (pip install 'meshwarden[plot]'); no plot was drawn"

PatchStyle = dict[str, Any]  # keyword arguments of a matplotlib Rectangle: facecolor, edgecolor, hatch ...


def load_pyplot() -> Any | None:
    """matplotlib's pyplot on the file-only backend, or None when matplotlib is not installed."""
    try:
        import matplotlib  # type: ignore[import-not-found, unused-ignore]

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # type: ignore[import-not-found, unused-ignore]
    except ImportError:
        return None
    return plt


def save_figure(plt: Any, figure: Any, path: Path) -> Path:
    """Write a figure (its format from the file's suffix) and free it; a file that cannot be
    written is a MeshwardenError, not a traceback."""
    try:
        figure.savefig(path)
    except (OSError, ValueError) as exc:
        raise MeshwardenError(f"cannot write the plot to {path}: {exc}") from None
    finally:
        plt.close(figure)
    return path


def draw_lattice(
    plt: Any,
    axes: Any,
    layout: dict[str, Any] | None,
    gates: dict[str, dict[str, str]],
    actuator_style: Callable[[str], PatchStyle],
    monitor_colour: Callable[[str], str] | None = None,
    unplaced: Sequence[str] = (),
) -> None:
    """Draw the lattice (``layout`` as :meth:`LatticeTopology.as_dict` gives it) on ``axes``;
    ``actuator_style(actuator_id)`` fills each half gate (an id of "" is a gate part not
    configured), ``monitor_colour(monitor_id)`` colours each tap. Without a layout, the
    ``unplaced`` names are drawn as a grid of boxes, each styled by ``actuator_style``."""
    if layout:
        for gate, (column, top) in layout["gates"].items():
            members = gates.get(gate, {})
            for offset, attribute in ((0.0, "coupler"), (0.4, "phase")):
                style = actuator_style(members.get(attribute, ""))
                axes.add_patch(plt.Rectangle((column + offset, top + 0.1), 0.4, 0.8, **style))
            axes.text(column + 0.4, top + 0.5, gate, ha="center", va="center", fontsize=7)
        if monitor_colour is not None:
            for monitor, (after, mode) in layout["taps"].items():
                axes.plot(after + 0.9, mode + 0.5, "o", color=monitor_colour(monitor))
                axes.text(after + 0.9, mode + 0.8, monitor, ha="center", fontsize=6)
        axes.set_xlim(-0.5, max(c for c, _ in layout["gates"].values()) + 1.5)
        axes.set_ylim(layout["modes"] + 0.5, -0.5)
        axes.set_xlabel("column")
        axes.set_ylabel("mode")
        return
    width = max(1, int(len(unplaced) ** 0.5))
    for k, name in enumerate(unplaced):
        axes.add_patch(plt.Rectangle((k % width, k // width), 0.9, 0.9, **actuator_style(name)))
        axes.text(k % width + 0.45, k // width + 0.45, name, ha="center", va="center", fontsize=6)
    axes.set_xlim(0, width)
    axes.set_ylim(len(unplaced) // width + 1, 0)
