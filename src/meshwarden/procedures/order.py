"""The progressive calibration order of a lattice: which gate part can be measured next, and how.

Method (after the self-configuring meshes of Miller, Photon. Res. 1:1, 2013 and Optica 2:747,
2015: set gates in order, each observed at a monitor using only gates already set): starting
from nothing calibrated, repeat passes over the couplers (column by column) and then the phase
shifters, taking every part that can be observed with what is calibrated so far, until a pass
adds nothing. What is left is ``unobservable``, each with the reason found on the last try.

* A calibrated coupler can be set to bar, cross or a split. An uncalibrated one sits at 0 V; with
  ``rest_coupling="bar"`` it passes light straight (the demo's couplers are nearly bar at rest),
  with ``"unknown"`` it is a splitter of unknown ratio.
* Coupler of gate g: light must reach exactly one input of g (routed back through calibrated
  gates), and each output's light must reach taps on its own, never mixed with other light (its
  power is the sum over the listed taps). kappa = cross / (bar + cross).
* Phase shifter of gate g (mode k after g's coupler): the next gate on mode k (the combiner h)
  must be calibrated and is set to 1/2, g is set to a split, both inputs of h must be lit, and
  taps must see one output of h alone (``fringe_port``: "top" = h's top mode, else "bottom"; the
  fringe is the sum over ``fringe_taps``; the two ports' fringes are opposite in sign). The
  fringe's argument is then the target's phase plus the phases in ``arm_phases`` minus those in
  ``reference_phases`` (shifters on the two paths between their common split and h) plus a
  constant of the split and the combiner: phases are observable only as such differences. A
  phase on a mode that no later gate takes changes no power: unobservable.

``settings`` lists the calibrated gates whose setting matters for a step (every gate the light
touches); every other actuator is held where it is (uncalibrated ones at 0 V).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import asdict, dataclass
from typing import Any

from meshwarden.procedures.inputs import ProcedureInputError
from meshwarden.procedures.lattice import Flow, Labels, LatticeTopology, propagate
from meshwarden.procedures.quality import plain_dict

REST_COUPLINGS = ("bar", "unknown")


@dataclass(frozen=True)
class CalibrationStep:
    """One part of one gate to calibrate, with the settings and taps that observe it."""

    gate: str
    part: str
    settings: tuple[tuple[str, str], ...]
    lit_input: int = -1
    bar_taps: tuple[str, ...] = ()
    cross_taps: tuple[str, ...] = ()
    combiner: str = ""
    fringe_taps: tuple[str, ...] = ()
    fringe_port: str = ""
    arm_phases: tuple[str, ...] = ()
    reference_phases: tuple[str, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return plain_dict(asdict(self))


@dataclass(frozen=True)
class Unobservable:
    """A gate part no configured tap can observe, and why."""

    gate: str
    part: str
    reason: str

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return plain_dict(asdict(self))


@dataclass(frozen=True)
class CalibrationOrder:
    """Steps in the order to take them, and the parts that cannot be calibrated."""

    steps: tuple[CalibrationStep, ...]
    unobservable: tuple[Unobservable, ...]

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {"steps": [s.as_dict() for s in self.steps], "unobservable": [u.as_dict() for u in self.unobservable]}


class _Planner:
    def __init__(self, topology: LatticeTopology, rest: str, calibrated: set[str]) -> None:
        self.t, self.rest, self.calibrated = topology, rest, calibrated

    def setting_of(self, chosen: dict[str, str]) -> dict[str, str]:
        rest = "bar" if self.rest == "bar" else "split"
        return {g: chosen.get(g, "bar") if g in self.calibrated else rest for g in self.t.gates}

    def light(self, chosen: dict[str, str], stop_after: int) -> Flow:
        """Laser light followed to after ``stop_after`` with the chosen settings (other calibrated gates bar)."""
        settings = self.setting_of(chosen)
        start: Labels = {m: frozenset({"light"}) for m in self.t.input_modes}
        return propagate(self.t, start, -1, stop_after, settings)

    def reach(self) -> list[Labels]:
        """Where light can be after each column -1 .. last (at index + 1) when every calibrated gate may split."""
        settings = self.setting_of({g: "split" for g in self.calibrated})
        states = [propagate(self.t, {m: frozenset({"light"}) for m in self.t.input_modes}, -1, -1, settings).labels]
        for column in range(self.t.columns):
            states.append(propagate(self.t, states[-1], column - 1, column, settings).labels)
        return states

    def route(self, after: int, mode: int, chosen: dict[str, str]) -> list[tuple[str, int]] | None:
        """Fix settings of calibrated gates so light reaches ``mode`` after column ``after``; the path back."""
        path: list[tuple[str, int]] = []
        reach_all = self.reach()
        while after >= 0:
            reach = reach_all[after]
            lit_now = self.light(chosen, after - 1).labels
            gate = self.t.gate_at(after, mode)
            if gate is not None:
                top = self.t.gates[gate][1]
                other = 2 * top + 1 - mode
                if gate in chosen:
                    allowed = {"bar": [mode], "cross": [other], "split": [mode, other]}[chosen[gate]]
                    allowed += [mode, other] if gate in self.calibrated else []
                elif gate in self.calibrated or self.rest == "unknown":
                    allowed = [mode, other]
                else:
                    allowed = [mode]
                # Prefer light already there: a path that needs no new split keeps both arms' history common.
                options = sorted((m for m in dict.fromkeys(allowed) if m in reach), key=lambda m: m not in lit_now)
                if not options:
                    return None
                if gate in self.calibrated:
                    # A gate two paths need in different ways splits the light between them.
                    want = "bar" if options[0] == mode else "cross"
                    chosen[gate] = want if chosen.get(gate, want) == want else "split"
                path.append((gate, mode))
                mode = options[0]
            after -= 1
        return path if mode in self.t.input_modes else None

    def used(self, chosen: dict[str, str], touched: Iterable[str], skip: str) -> tuple[tuple[str, str], ...]:
        settings = self.setting_of(chosen)
        return tuple(sorted((g, settings[g]) for g in set(touched) | set(chosen) if g in self.calibrated and g != skip))

    def coupler(self, gate: str) -> CalibrationStep | str:
        column, top = self.t.gates[gate]
        reason = f"no light reaches an input of {gate} through calibrated gates"
        for lit_in in (top, top + 1):
            chosen: dict[str, str] = {}
            if self.route(column - 1, lit_in, chosen) is None:
                continue
            lighting = self.light(chosen, column - 1)
            if 2 * top + 1 - lit_in in lighting.labels:
                reason = f"light reaches both inputs of {gate} (modes {top}, {top + 1}) whatever calibrated gates do"
                continue
            flow = _follow_outputs(self.t, lighting.labels, gate, lit_in, self.setting_of(chosen))
            left = set().union(*flow.labels.values())
            lost = [lab for lab in ("bar", "cross") if lab in left or lab not in flow.captured]
            if lost:
                reason = f"the {' and '.join(lost)} light of {gate} reaches no tap unmixed with other light"
                continue
            return CalibrationStep(
                gate, "coupler", self.used(chosen, flow.touched | lighting.touched, gate), lit_input=lit_in,
                bar_taps=tuple(flow.captured["bar"]), cross_taps=tuple(flow.captured["cross"]),
            )  # fmt: skip
        return reason

    def phase(self, gate: str) -> CalibrationStep | str:
        column, mode = self.t.gates[gate]
        later = [c for c in range(column + 1, self.t.columns) if self.t.gate_at(c, mode) is not None]
        if not later:
            return f"no gate after column {column} takes mode {mode}: the phase of {gate} changes no power at any tap"
        combiner = self.t.gate_at(later[0], mode)
        assert combiner is not None
        if gate not in self.calibrated:
            return f"its own coupler is not calibrated, so {gate} cannot be set to split the light"
        if combiner not in self.calibrated:
            return f"its combiner {combiner} is not calibrated"
        h_col, h_top = self.t.gates[combiner]
        partner = 2 * h_top + 1 - mode
        chosen = {gate: "split", combiner: "split"}
        arm = self.route(column, mode, chosen)
        ref = self.route(h_col - 1, partner, chosen)
        lighting = self.light(chosen, h_col - 1)
        before = lighting.labels
        if arm is None or ref is None or mode not in before or partner not in before:
            return f"light cannot reach both inputs of the combiner {combiner} (modes {mode}, {partner})"
        after_h = self.light(chosen, h_col).labels
        start = {m: frozenset({"other"}) for m in after_h if m not in (h_top, h_top + 1)}
        start[h_top], start[h_top + 1] = frozenset({"top"}), frozenset({"bottom"})
        flow = propagate(
            self.t, start, h_col, self.t.columns - 1, self.setting_of(chosen), frozenset({"top", "bottom"})
        )
        port = next((p for p in ("top", "bottom") if p in flow.captured), None)
        if port is None:
            return f"no tap sees an output of the combiner {combiner} unmixed with other light"
        arm_phases, ref_phases = _branch_phases(self.t, arm, ref)
        return CalibrationStep(
            gate, "phase", self.used(chosen, flow.touched | lighting.touched, ""), combiner=combiner,
            fringe_taps=tuple(flow.captured[port]), fringe_port=port,
            arm_phases=tuple(g for g in arm_phases if g != gate), reference_phases=ref_phases,
        )  # fmt: skip


def _branch_phases(
    t: LatticeTopology, arm: list[tuple[str, int]], ref: list[tuple[str, int]]
) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Phase shifters on each path after the gate where the two paths split (paths run back from h)."""
    ref_gates = [g for g, _ in ref]
    cut = next((i for i, (g, _) in enumerate(arm) if g in ref_gates), None)
    if cut is not None:
        arm, ref = arm[: cut + 1], ref[: ref_gates.index(arm[cut][0]) + 1]

    def on_top(path: list[tuple[str, int]]) -> tuple[str, ...]:
        return tuple(sorted(g for g, mode in path if t.gates[g][1] == mode))

    return on_top(arm), on_top(ref)


def _follow_outputs(t: LatticeTopology, before: Labels, gate: str, lit_in: int, settings: dict[str, str]) -> Flow:
    """Follow g's bar output (the lit input's mode) and cross output (the other mode) to the taps."""
    column, top = t.gates[gate]
    start = {m: frozenset({"other"}) for m in before if m != lit_in}
    start[lit_in] = frozenset({"bar"})
    through = propagate(t, start, column - 1, column, settings | {gate: "bar"})
    labels = dict(through.labels)
    labels[2 * top + 1 - lit_in] = frozenset({"cross"})
    flow = propagate(t, labels, column, t.columns - 1, settings, frozenset({"bar", "cross"}))
    flow.touched |= through.touched - {gate}
    return flow


def calibration_order(
    topology: LatticeTopology, *, rest_coupling: str = "bar", already_calibrated: Iterable[str] = ()
) -> CalibrationOrder:
    """The order in which the gates' couplers and phase shifters can be calibrated, and what cannot be."""
    if rest_coupling not in REST_COUPLINGS:
        raise ProcedureInputError(f"rest_coupling must be one of {', '.join(REST_COUPLINGS)}, got {rest_coupling!r}")
    calibrated = set(already_calibrated)
    unknown = sorted(calibrated - set(topology.gates))
    if unknown:
        raise ProcedureInputError(f"unknown gate {unknown[0]!r} in already_calibrated")
    planner = _Planner(topology, rest_coupling, calibrated)
    by_place = sorted(topology.gates, key=lambda g: topology.gates[g])
    remaining = [(g, "coupler") for g in by_place if g not in calibrated] + [(g, "phase") for g in by_place]
    steps: list[CalibrationStep] = []
    reasons: dict[tuple[str, str], str] = {}
    progress = True
    while progress and remaining:
        progress = False
        for target in list(remaining):
            gate, part = target
            found = planner.coupler(gate) if part == "coupler" else planner.phase(gate)
            if isinstance(found, str):
                reasons[target] = found
                continue
            steps.append(found)
            remaining.remove(target)
            progress = True
            if part == "coupler":
                calibrated.add(gate)
    return CalibrationOrder(tuple(steps), tuple(Unobservable(g, p, reasons[g, p]) for g, p in remaining))
