"""Calibration figures: what each actuator's figure and the lattice overview show, from a stored sweep."""

from __future__ import annotations

import math
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from meshwarden import calibration_plot
from meshwarden.calibration_plot import actuator_panels, file_names, overview_cells, write_plots
from meshwarden.lattice_plot import NO_MATPLOTLIB
from meshwarden.procedures.calibrate_run import sweep_record
from meshwarden.procedures.coupler_fit import MAX_RESIDUAL_KAPPA, fit_coupler_table
from meshwarden.procedures.fringe import fit_fringe

VOLTS = [0.0, 4.0, 8.0, 12.0, 16.0, 20.0, 24.0, 28.0, 32.0, 36.0, 40.0, 44.0]


def coupler_sweep(noise: float = 0.004) -> tuple[dict[str, Any], Any, list[float]]:
    """A coupler swept past full transfer: kappa = sin^2(C L) (Source: Yariv, IEEE JQE 9:919, 1973),
    C L growing with V^2 so the last points fall again; bar and cross powers with a little noise."""
    rng = np.random.default_rng(7)
    cl = (np.pi / 2) * 1.12 * (np.array(VOLTS) / 44.0) ** 2
    kappa = np.sin(cl) ** 2
    cross = np.clip(kappa + noise * rng.standard_normal(kappa.size), 1e-4, None)
    bar = np.clip(1.0 - kappa + noise * rng.standard_normal(kappa.size), 1e-4, None)
    fit = fit_coupler_table(VOLTS, bar, cross)
    sweep = sweep_record(
        "kappa",
        VOLTS,
        list(fit.measured_kappa),
        list(fit.fitted_kappa),
        {"volts": list(fit.volts), "kappa": list(fit.kappa)},
        fit.residual_rms / MAX_RESIDUAL_KAPPA,
    )
    return sweep, fit, list(kappa)


def fringe_truth(volts: Any) -> Any:
    """The generating fringe: P = A + B cos(phi0 + c V^2), A = 2e-6 W, B = 1.5e-6 W, phi0 = 0.7 rad,
    c = 4.5 pi / 44^2 rad/V^2 (the fit form of an electrostatic phase actuator; Tang, Nguyen & Howe,
    Sens. Actuators 20:25, 1989, for x ~ V^2)."""
    v = np.asarray(volts, dtype=float)
    return 2e-6 + 1.5e-6 * np.cos(0.7 + 4.5 * np.pi / 44.0**2 * v**2)


def phase_sweep() -> dict[str, Any]:
    volts = list(np.linspace(0.0, 44.0, 16))
    power = list(fringe_truth(volts) + 1e-9 * np.random.default_rng(3).standard_normal(16))
    fit = fit_fringe(volts, power, with_growth=True)
    return sweep_record("power_w", volts, power, list(fit.power_at(volts)), fit.model(), 0.2)


def shown_version(sweeps: dict[str, Any] | None) -> dict[str, Any]:
    """A calibration_show reply with sweeps, on a two-gate lattice."""
    return {
        "version": "cal-test",
        "active": False,
        "manifest": {
            "actuators": {
                "c0": {"status": "ok", "reason": "", "residual": 0.003},
                "p0": {"status": "failed", "reason": "phase uncertain to 0.02 rad", "residual": 1e-9},
                "c1": {"status": "ok", "reason": "", "residual": 0.001},
                "p1": {"status": "unobservable", "reason": "its phase changes no power at any tap"},
            }
        },
        "sweeps": sweeps,
        "layout": {"modes": 2, "gates": {"g0": [0, 0], "g1": [1, 0]}, "taps": {"m0": [1, 0]}, "input_modes": [0]},
        "gates": {"g0": {"coupler": "c0", "phase": "p0"}, "g1": {"coupler": "c1", "phase": "p1"}},
    }


def test_a_coupler_figure_shows_the_measured_points_the_table_and_the_residuals_of_the_points_used() -> None:
    """The coupler's panel holds the stored points; the points past full transfer have no fitted
    value and no residual; the residuals' rms is the fit's residual; the measured points follow
    sin^2(C L) within the noise (Source: Yariv 1973)."""
    sweep, fit, truth = coupler_sweep()
    (panel,), notes = actuator_panels(shown_version({"c0": sweep}))
    assert panel.actuator == "c0" and panel.file_name == "c0.png" and panel.quantity == "kappa"
    assert panel.volts == tuple(VOLTS) and panel.measured == pytest.approx(sweep["measured"], abs=0)
    assert fit.points_used < len(VOLTS)  # the sweep went past the top
    assert panel.fitted[fit.points_used :] == (None,) * (len(VOLTS) - fit.points_used)
    assert panel.residual_volts == tuple(VOLTS[: fit.points_used])
    assert math.sqrt(np.mean(np.square(panel.residuals))) == pytest.approx(fit.residual_rms, rel=1e-4)
    assert panel.curve_volts == pytest.approx(fit.volts) and panel.curve_values == pytest.approx(fit.kappa, abs=1e-6)
    assert max(abs(m - k) for m, k in zip(panel.measured, truth, strict=True)) < 0.02
    assert "c0 (cal-test): ok" in panel.title
    assert any("p1" in n and "unobservable" in n for n in notes) and any(
        n.startswith("no figure for p0") for n in notes
    )


def test_a_phase_figure_redraws_the_fitted_fringe_from_its_stored_parameters() -> None:
    """The fringe curve drawn from the stored parameters follows the generating fringe within 1 %
    of its amplitude over the whole sweep; the title carries the status and the reason."""
    sweep = phase_sweep()
    panels, _ = actuator_panels(shown_version({"p0": sweep}))
    (panel,) = [p for p in panels if p.actuator == "p0"]
    assert len(panel.curve_volts) == calibration_plot.CURVE_POINTS and panel.curve_label == "fitted fringe"
    assert np.max(np.abs(np.array(panel.curve_values) - fringe_truth(panel.curve_volts))) < 0.01 * 1.5e-6
    assert panel.residuals == pytest.approx([m - f for m, f in zip(sweep["measured"], sweep["fitted"], strict=True)])
    assert "failed: phase uncertain to 0.02 rad" in panel.title


def test_a_version_without_sweeps_gets_no_actuator_figures_and_says_so() -> None:
    """A version written before sweeps were kept: no panels, one line that says why; its overview
    marks every ok actuator as having no points, and keeps the others' status."""
    panels, notes = actuator_panels(shown_version(None))
    assert panels == [] and len(notes) == 1 and "no measured points" in notes[0]
    cells = overview_cells(shown_version(None))
    assert {a: c.status for a, c in cells.items()} == {
        "c0": "no_points",
        "c1": "no_points",
        "p0": "failed",
        "p1": "unobservable",
    }


def test_the_overview_colours_by_the_residual_share_of_the_gate_limit() -> None:
    """Each swept actuator's cell carries its stored residual share; unobservable ones carry none."""
    sweep, fit, _ = coupler_sweep()
    cells = overview_cells(shown_version({"c0": sweep, "p0": phase_sweep()}))
    assert cells["c0"].status == "ok"
    assert cells["c0"].residual_of_limit == pytest.approx(fit.residual_rms / MAX_RESIDUAL_KAPPA, rel=1e-3)
    assert cells["p0"] == calibration_plot.OverviewCell("failed", 0.2)
    assert cells["p1"] == calibration_plot.OverviewCell("unobservable", None)


def test_figure_names_are_the_actuator_ids_and_never_collide_with_the_overview() -> None:
    """Characters unsafe in a file name are replaced; an actuator called 'overview' moves the overview aside."""
    names, overview = file_names(["c0", "a/b", "overview"])
    assert names == {"c0": "c0.png", "a/b": "a_b.png", "overview": "overview.png"}
    assert overview == "_overview.png"
    assert file_names(["c0"])[1] == "overview.png"


class Recorder:
    """A stand-in for pyplot (and its figures and axes) that records what is drawn, and writes a
    file for each savefig."""

    def __init__(self, calls: list[tuple[str, tuple[Any, ...], dict[str, Any]]] | None = None, name: str = "") -> None:
        self.calls = [] if calls is None else calls
        self.name = name

    def __getattr__(self, name: str) -> Recorder:
        return Recorder(self.calls, name)

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        self.calls.append((self.name, args, kwargs))
        if self.name == "subplots":
            return self, ((self, self) if args[:1] == (2,) else self)
        if self.name == "savefig":
            Path(args[0]).write_bytes(b"figure")
        return self


def test_the_drawn_points_are_the_stored_points_and_every_figure_is_written(tmp_path: Path) -> None:
    """The actuator figure plots exactly the stored measured points and their residuals; one file
    per swept actuator and the overview are written, and the unobservable one gets a note instead."""
    sweep, fit, _ = coupler_sweep()
    recorder = Recorder()
    written, notes = write_plots(recorder, tmp_path / "plots", shown_version({"c0": sweep, "p0": phase_sweep()}))
    assert sorted(p.name for p in written) == ["c0.png", "overview.png", "p0.png"]
    assert all(p.exists() for p in written)
    assert any("c1" in n for n in notes) and any("p1" in n for n in notes)
    plotted = [args for name, args, _ in recorder.calls if name == "plot"]
    used = fit.points_used
    assert plotted[0] == (list(VOLTS[:used]), sweep["measured"][:used], "o")  # c0: the points the fit used
    assert plotted[1] == (list(VOLTS[used:]), sweep["measured"][used:], "o")  # and those past full transfer
    residuals = [m - f for m, f in zip(sweep["measured"][:used], sweep["fitted"][:used], strict=True)]
    assert plotted[2][0] == tuple(VOLTS[:used]) and plotted[2][1] == pytest.approx(residuals)


def test_plots_without_matplotlib_say_so_in_one_line(monkeypatch: pytest.MonkeyPatch, capsys: Any) -> None:
    """When matplotlib cannot be imported, asking for a plot prints one line naming the extra and draws nothing."""
    from meshwarden.cli_calibrate import _pyplot_for

    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import now raises ImportError
    assert _pyplot_for("somewhere") is None
    assert capsys.readouterr().err.strip() == NO_MATPLOTLIB
    assert _pyplot_for(None) is None and capsys.readouterr().err == ""
