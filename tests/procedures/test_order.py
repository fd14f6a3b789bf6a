"""Progressive calibration order, checked by propagating light through the simulator's own lattice model."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from meshsim.physics.optics import Lattice, LatticeLayout
from meshwarden.procedures import ProcedureInputError
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.order import CalibrationStep, calibration_order

DEMO = Path(__file__).resolve().parents[2] / "config" / "demo" / "simulator.yaml"
KAPPA_OF = {"bar": 0.0, "cross": 1.0, "split": 0.5}


def _demo() -> LatticeTopology:
    spec = yaml.safe_load(DEMO.read_text())
    return LatticeTopology.from_lattice(
        spec["lattice"]["modes"], spec["lattice"]["columns"], spec["lattice"]["taps"], [0]
    )


def _mesh(modes: int, columns: int, tap_columns: tuple[int, ...], inputs: tuple[int, ...] = (0,)) -> LatticeTopology:
    """A rectangular mesh: even columns start at mode 0, odd at mode 1; a tap on every mode after ``tap_columns``."""
    gates = {f"g{c}{k}": (c, k) for c in range(columns) for k in range(c % 2, modes - 1, 2)}
    taps = {f"m{c}{k}": (c, k) for c in tap_columns for k in range(modes)}
    return LatticeTopology(modes, gates, taps, inputs)


class _Chip:
    """The simulator's lattice (sim/meshsim/physics/optics.py) lossless, with every actuator settable."""

    def __init__(self, topology: LatticeTopology, seed: int, rest_kappa: str) -> None:
        self.t = topology
        self.ids = sorted(topology.gates)
        rng = np.random.default_rng(seed)
        self.kappa = dict(zip(self.ids, rng.uniform(0.05, 0.95, len(self.ids)), strict=True))
        self.phase = dict(zip(self.ids, rng.uniform(0, 2 * math.pi, len(self.ids)), strict=True))
        self.rest = {g: (0.0 if rest_kappa == "bar" else float(rng.uniform(0.1, 0.9))) for g in self.ids}
        self.monitors = sorted(topology.taps)
        columns = tuple(
            tuple((self.ids.index(g), top) for g, (c, top) in topology.gates.items() if c == col)
            for col in range(topology.columns)
        )
        layout = LatticeLayout(topology.modes, columns, tuple(topology.taps[m] for m in self.monitors), 0.01)
        self.lattice = Lattice(layout)

    def taps(self, step: CalibrationStep, calibrated: set[str], phases: dict[str, float]) -> dict[str, float]:
        settings = dict(step.settings)
        kappa = np.array([
            self.kappa[g] if g == step.gate and step.part == "coupler"
            else KAPPA_OF[settings[g]] if g in settings
            else (KAPPA_OF["bar"] if g in calibrated else self.rest[g])
            for g in self.ids
        ])  # fmt: skip
        field = np.zeros(self.t.modes, dtype=complex)
        field[list(self.t.input_modes)] = 1.0
        phase = np.array([phases[g] for g in self.ids])
        _, power = self.lattice.propagate(field, kappa, phase, np.ones(len(self.ids)))
        return dict(zip(self.monitors, power, strict=True))


def _check_steps(topology: LatticeTopology, rest: str, seed: int) -> None:
    chip = _Chip(topology, seed, rest)
    order = calibration_order(topology, rest_coupling=rest)
    calibrated: set[str] = set()
    for step in order.steps:
        assert {g for g, _ in step.settings} <= calibrated | {step.gate}, step
        if step.part == "coupler":
            power = chip.taps(step, calibrated, chip.phase)
            bar = sum(power[m] for m in step.bar_taps)
            cross = sum(power[m] for m in step.cross_taps)
            assert cross / (bar + cross) == pytest.approx(chip.kappa[step.gate], abs=1e-9), step
            calibrated.add(step.gate)
            continue
        assert step.combiner in calibrated

        def fringe(phases: dict[str, float], step: CalibrationStep = step) -> float:
            """Phase of the fringe at the step's taps as the target's phase goes round."""
            sweep = np.linspace(0, 2 * math.pi, 8, endpoint=False)
            power = [
                sum(chip.taps(step, calibrated, phases | {step.gate: s})[m] for m in step.fringe_taps) for s in sweep
            ]
            coef = np.fft.rfft(power)[1]
            assert abs(coef) > 0.05 * abs(np.fft.rfft(power)[0]), "the fringe must have visible contrast"
            return float(np.angle(coef))

        base = fringe(chip.phase)
        for g in chip.ids:
            if g == step.gate:
                continue
            moved = fringe(chip.phase | {g: chip.phase[g] + 0.3})
            shift = (moved - base + math.pi) % (2 * math.pi) - math.pi
            expected = 0.3 if g in step.arm_phases else -0.3 if g in step.reference_phases else 0.0
            assert shift == pytest.approx(expected, abs=1e-9), (step.gate, g)


@pytest.mark.parametrize("seed", range(3))
def test_demo_steps_measure_what_they_claim(seed: int) -> None:
    """On the demo lattice every coupler step's taps give kappa exactly, and every phase step's fringe moves
    with its arm phases, against its reference phases and with nothing else (the simulator's lattice model)."""
    _check_steps(_demo(), "bar", seed)


@pytest.mark.parametrize(("rest", "seed"), [("unknown", 0), ("unknown", 1), ("bar", 5)])
def test_small_mesh_steps_hold_with_unknown_rest_couplings(rest: str, seed: int) -> None:
    """With couplers of unknown ratio at rest, the summed taps still give kappa exactly (power is conserved
    through a lossless coupler) and the fringes depend only on the listed phases."""
    _check_steps(_mesh(6, 6, (0, 1, 2, 3, 4, 5), (0, 3)), rest, seed)


def test_demo_order_reaches_every_lit_gate() -> None:
    """With light in mode 0 only, exactly the couplers the light can reach (top mode <= column) are calibrated,
    and every other coupler is unobservable for lack of light."""
    topology = _demo()
    order = calibration_order(topology)
    lit = {g for g, (c, top) in topology.gates.items() if top <= c}
    assert {s.gate for s in order.steps if s.part == "coupler"} == lit
    dark = [u for u in order.unobservable if u.part == "coupler"]
    assert {u.gate for u in dark} == set(topology.gates) - lit
    assert all("no light reaches an input" in u.reason for u in dark)
    steps = [(s.gate, s.part) for s in order.steps]
    assert steps.index(("g15", "coupler")) < steps.index(("g00", "phase"))


def test_final_column_phases_are_unobservable_with_the_reason() -> None:
    """A phase on a mode no later gate takes changes no power: reported unobservable, never given a step."""
    order = calibration_order(_demo())
    reasons = {(u.gate, u.part): u.reason for u in order.unobservable}
    for gate in ("g53", "g56", "g45"):
        assert "changes no power at any tap" in reasons[gate, "phase"]


def test_a_gate_without_taps_downstream_is_unobservable() -> None:
    """A single gate with no monitor at all cannot be calibrated, and the order says why."""
    order = calibration_order(LatticeTopology(2, {"g": (0, 0)}, {}, (0,)))
    assert order.steps == ()
    assert [(u.gate, u.part) for u in order.unobservable] == [("g", "coupler"), ("g", "phase")]
    assert "reaches no tap" in order.unobservable[0].reason


def test_order_as_dict_is_plain_data() -> None:
    """The order converts to lists, dicts, strings and numbers only."""
    data = calibration_order(_mesh(4, 4, (1, 3))).as_dict()
    assert yaml.safe_load(yaml.safe_dump(data)) == data


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ((1, {}, {}, (0,)), "at least 2 modes"),
        ((4, {"g": (0, 3)}, {}, (0,)), "outside the lattice"),
        ((4, {"a": (0, 0), "b": (0, 1)}, {}, (0,)), "share mode 1"),
        ((4, {"a": (0, 0)}, {"m": (1, 0)}, (0,)), "tap m"),
        ((4, {"a": (0, 0)}, {}, (0, 0)), "distinct"),
        ((4, {"a": (0, 0)}, {}, (5,)), "must lie in"),
    ],
)
def test_bad_topologies_are_refused(args: tuple[object, ...], message: str) -> None:
    """Inconsistent lattices raise ProcedureInputError naming the problem."""
    with pytest.raises(ProcedureInputError, match=message):
        LatticeTopology(*args)  # type: ignore[arg-type]


def test_bad_order_arguments_are_refused() -> None:
    """An unknown rest model or an unknown already-calibrated gate is refused."""
    with pytest.raises(ProcedureInputError, match="rest_coupling"):
        calibration_order(_mesh(4, 2, (1,)), rest_coupling="guess")
    with pytest.raises(ProcedureInputError, match="unknown gate 'zz'"):
        calibration_order(_mesh(4, 2, (1,)), already_calibrated=["zz"])


def test_a_phase_needs_its_own_coupler_calibrated() -> None:
    """With light at both inputs of a gate its coupler cannot be measured, and then neither can its phase,
    even with the combiner given as calibrated."""
    topology = LatticeTopology(2, {"a": (0, 0), "b": (1, 0)}, {"m0": (1, 0), "m1": (1, 1)}, (0, 1))
    order = calibration_order(topology, already_calibrated=["b"])
    reasons = {(u.gate, u.part): u.reason for u in order.unobservable}
    assert "light reaches both inputs of a" in reasons["a", "coupler"]
    assert "its own coupler is not calibrated" in reasons["a", "phase"]
