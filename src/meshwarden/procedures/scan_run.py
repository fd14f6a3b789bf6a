"""The fault scan: a thin async runner over the pure cores (designs, verdicts, scan_paths).

One scan, under a held motion claim on the actuators it tests:

1. ``rest_frames`` monitor frames back to back at the operating point (the noise of every
   monitor and its rest level) and a sense read (the drivers at the operating point);
2. the frames of a 0/1 multiplexed design (:func:`.designs.s_matrix_design`: a rest frame and
   the rows of an S-matrix) over the actuators a monitor can see, each moved by its own small
   step: the step that changes its calibrated value by ``kappa_step`` (or ``phase_step_rad``),
   toward zero when it sits high enough, else up, never above ``test_volts`` (so no output
   exceeds the larger of its operating voltage and the test voltage). N actuators cost the
   smallest power of two above N frames, plus the rest frames;
3. second looks (rest, a half step, a full step ``second_look_factor`` times the scan's aim, rest) at
   each actuator that showed no response, or only one its neighbours' crosstalk could explain, and
   at the coupler before each monitor in doubt (reading nothing, or never changing): an operating
   point at an extremum of its effect gives no first-order response but a clear second-order one,
   and two step sizes leave no operating point where both show nothing; a stuck actuator shows
   neither;
4. the actuators no monitor can see are stepped once together for the driver check (sense only,
   no monitor frame);
5. every output goes back to its initial code, and the codes are compared.

Steps are not journaled (the journal keeps the operating point, which is where the scan ends).
Verdicts: monitors first (:func:`.verdicts.monitor_verdict`, :func:`.verdicts.dark_monitor_verdict`),
then each actuator from its sense readings and its strongest response on a healthy monitor
that can see it (:func:`.verdicts.actuator_verdict`). With a lattice topology the scan knows who
can see what (:mod:`.scan_paths`); without one it cannot tell a stuck actuator from one no
monitor sees, and says so (``unobservable``).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from meshwarden.controller import Controller
from meshwarden.errors import MeshwardenError, RefusedError, StoppedRefused, UnknownTargetRefused
from meshwarden.mapping import code_to_volts, volts_to_code
from meshwarden.procedures.designs import PerturbationDesign, scan_design
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_attribution import coupling_angle
from meshwarden.procedures.scan_judge import (
    ActuatorPlan,
    ScanSettings,
    calibrated_kappas,
    judge_scan,
)
from meshwarden.procedures.scan_paths import (
    gate_setting,
    neighbours,
    sight,
)

__all__ = ["ScanControl", "ScanSettings", "run_scan"]


@dataclass
class ScanControl:
    """A cooperative stop for a running scan: checked between frames; the scan then returns the outputs
    and ends ``stopped`` (its claim is not stopped, so that it can still move them back)."""

    reason: str | None = None

    def stop(self, reason: str) -> None:
        if self.reason is None:
            self.reason = reason


def _gate_of(controller: Controller) -> dict[str, tuple[str, str]]:
    out = {}
    for gid, gate in controller.gates.items():
        out[gate.coupler] = (gid, "kappa")
        out[gate.phase] = (gid, "phase")
    return out


def _volts(controller: Controller, aid: str, code: int) -> float:
    board = controller.actuators[aid].board
    return code_to_volts(code, board.full_scale_volts, board.dac_bits)


def _code(controller: Controller, aid: str, volts: float) -> int:
    board = controller.actuators[aid].board
    return volts_to_code(volts, board.full_scale_volts, board.dac_bits)


DRIFT_TERMS = 2  # Legendre drift terms fitted with the design where the frames leave room (degrees 1 and 2)


def _design(actuators: int) -> PerturbationDesign:
    """The S-matrix design in drift-robust order, with as many drift terms as its spare frames allow (up to 2)."""
    return scan_design(actuators, DRIFT_TERMS)


def _choose_step(controller: Controller, plan: ActuatorPlan, settings: ScanSettings) -> None:
    """Signed step (volts, on a code) that moves the calibrated value by about the wanted amount."""
    act = controller.actuators[plan.actuator]
    wanted = settings.kappa_step if plan.attribute == "kappa" else settings.phase_step_rad
    v0 = plan.volts0
    try:
        value0 = act.map.value_at(v0)
        probe = min(0.05, max(v0, 0.05))
        down = v0 >= probe
        slope = abs(act.map.value_at(v0 - probe if down else v0 + probe) - value0) / probe
    except MeshwardenError as exc:
        plan.reason = f"its operating point is outside its calibration ({exc.message})"
        return
    size = min(settings.max_step_volts, wanted / slope if slope > 0 else math.inf)
    ceiling = min(settings.test_volts, act.limit.hard_limit_volts)
    target = v0 - size if v0 >= size else min(v0 + size, ceiling)
    code = _code(controller, plan.actuator, target)
    if code == plan.code0:
        code = plan.code0 - 1 if plan.code0 > 0 else plan.code0 + 1
    if code > act.limit.hard_limit_code or (code > plan.code0 and _volts(controller, plan.actuator, code) > ceiling):
        plan.reason = f"no room for a test step below {ceiling:g} V from {v0:.4g} V"
        return
    plan.step_volts = _volts(controller, plan.actuator, code) - v0
    try:
        plan.value_step = act.map.value_at(v0 + plan.step_volts) - value0
    except MeshwardenError as exc:
        plan.reason = f"its test step leaves its calibration ({exc.message})"
        return
    if abs(plan.value_step) < wanted / 4:
        unit = "rad" if plan.attribute == "phase" else "(kappa)"
        plan.reason = (
            f"at {v0:.4g} V a {abs(plan.step_volts):.3g} V step changes its value by only {abs(plan.value_step):.2g} "
            f"{unit}: no first-order effect at this operating point"
        )


async def run_scan(
    controller: Controller,
    targets: list[str] | None = None,
    *,
    owner: str,
    settings: ScanSettings | None = None,
    topology: LatticeTopology | None = None,
    control: ScanControl | None = None,
    progress: Callable[[int, int], None] | None = None,
    on_claim: Callable[[Any], None] | None = None,
    reference: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """Scan ``targets`` (actuator or gate ids; default every actuator) and return the report.

    ``reference`` is an earlier report: where it was taken at the same codes on every output, an actuator
    that was ``ok`` then is expected to respond as it did then (``drifted`` if it does not)."""
    settings = settings or ScanSettings()
    operating_codes = {a: int(controller.describe(a)["code"]) for a in controller.actuators}
    same_point = reference is not None and reference.get("operating_codes") == operating_codes
    control = control or ScanControl()
    ids = _resolve(controller, targets)
    sense0 = await controller.read_sense()
    blocked = controller._state.unavailable({controller.actuators[a].board.id for a in ids})
    untested = [a for a in ids if a not in sense0 or controller.actuators[a].board.id in blocked]
    tested = [a for a in ids if a not in untested]
    gate_of = _gate_of(controller)
    plans = {}
    for aid in tested:
        code0 = int(controller.describe(aid)["code"])
        gate, attribute = gate_of.get(aid, (None, controller.actuators[aid].config.kind))
        if attribute == "coupler":
            attribute = "kappa"
        plans[aid] = ActuatorPlan(aid, gate, attribute, code0, _volts(controller, aid, code0))
    settings_of = _gate_settings(controller)
    near = _neighbour_ids(controller, topology, plans)
    for plan in plans.values():
        if plan.gate is None:
            plan.reason = "it belongs to no gate"
        elif topology is not None:
            seen = sight(topology, settings_of, plan.gate, plan.attribute)
            plan.seen_by, plan.reason = seen.monitors, seen.reason
        unseen = plan.reason
        _choose_step(controller, plan, settings)
        plan.reason = unseen or plan.reason
    optical = [a for a in tested if not plans[a].reason]
    sense_only = [a for a in tested if plans[a].reason and plans[a].step_volts != 0.0]
    design = _design(len(optical)) if optical else None

    frames: list[dict[str, float]] = []
    rest: list[dict[str, float]] = []
    total = settings.rest_frames + (design.frames if design else 0) + 2
    done = 0

    def tick() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total)

    final_codes: dict[str, int] = {}
    second_look: dict[str, dict[str, float]] = {}
    big_value: dict[str, float] = {}
    big_dv2: dict[str, float] = {}
    half_look: dict[str, dict[str, float]] = {}
    half_value: dict[str, float] = {}
    half_dv2: dict[str, float] = {}

    def act_value(aid: str, volts: float) -> float:
        act = controller.actuators[aid]
        return float(act.map.value_at(volts) - act.map.value_at(plans[aid].volts0))

    extra_frames = 0
    stopped: str | None = None
    async with controller.claim(tested, owner=owner, purpose="scan") as claim:
        if on_claim is not None:
            on_claim(claim)
        # The claim may have waited for a request that moved these outputs: the codes planned from
        # (and to be restored at the end) would be stale. Refuse rather than undo that request.
        moved = [a for a in tested if int(controller.describe(a)["code"]) != plans[a].code0]
        if moved:
            raise RefusedError(
                f"scan: {', '.join(sorted(moved)[:8])} moved while the scan waited for its claim; scan again",
                actuators=sorted(moved),
            )

        async def frame(moves: dict[str, float], *, monitors: bool, sense: bool = True) -> dict[str, float] | None:
            if moves:
                await claim.move(moves, volts=True, journal=False)
            sensed = await claim.read_sense() if sense else {}
            for aid, plan in plans.items():
                if aid in sensed:
                    plan.commanded.append(_volts(controller, aid, int(controller.describe(aid)["code"])))
                    plan.sensed.append(sensed[aid])
            if not monitors:
                return None
            levels = await claim.read_monitors(average=1, integration_s=settings.integration_s)
            return {m: r["amps"] for m, r in levels.items()}

        home = {a: plans[a].volts0 for a in tested}
        try:
            for k in range(settings.rest_frames):  # back to back: the noise, not the drift
                _check(control)
                rest.append(await frame({}, monitors=True, sense=k == 0) or {})
                tick()
            if design is not None:
                for row in design.pattern:
                    _check(control)
                    moves = {a: plans[a].volts0 + x * plans[a].step_volts for a, x in zip(optical, row, strict=True)}
                    frames.append(await frame(moves, monitors=True) or {})
                    tick()
                await claim.move({a: plans[a].volts0 for a in optical}, volts=True, journal=False)
            if design is not None and topology is not None:
                first = judge_scan(
                    controller,
                    settings,
                    topology,
                    settings_of,
                    plans,
                    untested,
                    rest,
                    frames,
                    design,
                    optical,
                    near=near,
                    blame=False,
                )
                suspects = [a for a in optical if _suspect(first["actuators"][a])]
                footprint = {a: _footprint(plans, near, a) for a in suspects}
                for cone_gate in {g for gates in first["monitor_looks"].values() for g in gates}:
                    # couplers whose move tests a doubtful monitor
                    coupler = controller.gates[cone_gate].coupler
                    monitors_of = set(first["cones"][cone_gate])
                    footprint[coupler] = footprint.get(coupler, set()) | monitors_of | _footprint(plans, near, coupler)
                for group in _groups(footprint):
                    _check(control)
                    angles = first["look_angles"]
                    big = {a: plans[a].volts0 + _big_step(controller, plans[a], settings, angles.get(a)) for a in group}
                    big = {a: v for a, v in big.items() if v != plans[a].volts0}
                    if not big:
                        continue
                    # rest, half way, all the way, rest again: two sizes of step leave a working actuator no operating
                    # point where both show nothing; the light drifts meanwhile, and a straight drift cancels
                    halfway = {a: _middle_volts(controller, plans[a], v, settings) for a, v in big.items()}
                    before = await frame({}, monitors=True, sense=False) or {}
                    middle = await frame(halfway, monitors=True) or {}
                    after = await frame(big, monitors=True) or {}
                    back = await frame({a: plans[a].volts0 for a in big}, monitors=True, sense=False) or {}
                    extra_frames += 4
                    for aid in big:
                        second_look[aid] = {m: after[m] - (before[m] + 2 * back[m]) / 3 for m in after}
                        half_look[aid] = {m: middle[m] - (2 * before[m] + back[m]) / 3 for m in middle}
                        half_value[aid] = act_value(aid, halfway[aid])
                        half_dv2[aid] = halfway[aid] ** 2 - plans[aid].volts0 ** 2
                        act = controller.actuators[aid]
                        big_value[aid] = act.map.value_at(big[aid]) - act.map.value_at(plans[aid].volts0)
                        big_dv2[aid] = big[aid] ** 2 - plans[aid].volts0 ** 2
            if sense_only:
                _check(control)
                await frame({a: plans[a].volts0 + plans[a].step_volts for a in sense_only}, monitors=False)
            tick()
        except StoppedRefused as exc:
            stopped = exc.message
        finally:
            handed_over = claim.ended or claim.stopping  # disarm and estop take the outputs over
            if not handed_over:
                await claim.move(home, volts=True, journal=False)
            final_codes = {a: int(controller.describe(a)["code"]) for a in tested}
            tick()
    restored = all(final_codes[a] == plans[a].code0 for a in tested)
    if stopped is not None:
        raise StoppedRefused(
            f"scan stopped: {stopped}; {_where_outputs_went(handed_over, restored, claim.stop_reason)}",
            outputs_returned=restored and not handed_over,
        )
    earlier = (reference or {}).get("actuators", {}) if same_point else {}
    report = judge_scan(
        controller,
        settings,
        topology,
        settings_of,
        plans,
        untested,
        rest,
        frames,
        design,
        optical,
        second_look,
        big_value,
        earlier,
        near=near,
        big_dv2=big_dv2,
        half_look=(half_look, half_value, half_dv2),
    )
    report.pop("monitor_looks")
    report.pop("cones")
    report["frames"] = len(rest) + len(frames) + extra_frames
    report["outputs_restored"] = restored
    report["actuators_tested"] = len(tested)
    report["layout"] = topology.as_dict() if topology is not None else None
    report["gates"] = {g: {"coupler": gate.coupler, "phase": gate.phase} for g, gate in controller.gates.items()}
    report["operating_codes"] = operating_codes
    report["compared_with_reference"] = bool(earlier)
    return report


def _middle_volts(controller: Controller, plan: ActuatorPlan, big_volts: float, settings: ScanSettings) -> float:
    """The middle frame of a second look: the big step mirrored to the other side of the operating point where
    there is room (no higher than the test voltage or the hard limit, no lower than 0 V), else half the big step.

    A turn by +s and by -s of a fringe D + Q-part changes it by -(D (1 - cos s) +- Q sin s): their sum does not
    depend on the unknown part, so at least one shows D (1 - cos s), about six times what a half and a full step
    in one direction guarantee (:func:`.scan_attribution.offset_fringe_sigmas`)."""
    act = controller.actuators[plan.actuator]
    mirrored = 2.0 * plan.volts0 - big_volts
    ceiling = min(settings.test_volts, act.limit.hard_limit_volts)
    code = _code(controller, plan.actuator, mirrored)
    if mirrored >= 0.0 and code <= act.limit.hard_limit_code and code != plan.code0:
        volts = _volts(controller, plan.actuator, code)
        if volts <= plan.volts0 or volts <= ceiling:
            try:
                act.map.value_at(volts)
            except MeshwardenError:
                pass
            else:
                return volts
    # half the big step's change of value (not of volts: the value goes about as V^2), found by bisection
    try:
        value0 = act.map.value_at(plan.volts0)
        half = (act.map.value_at(big_volts) - value0) / 2.0
        low, high = (plan.volts0, big_volts) if big_volts > plan.volts0 else (big_volts, plan.volts0)
        for _ in range(40):  # the value rises with the volts: below the half-way value, the middle moves up
            middle = (low + high) / 2.0
            low, high = (middle, high) if act.map.value_at(middle) - value0 < half else (low, middle)
        target = (low + high) / 2.0
    except MeshwardenError:
        target = (big_volts + plan.volts0) / 2.0
    return _volts(controller, plan.actuator, _code(controller, plan.actuator, target))


def _where_outputs_went(handed_over: bool, restored: bool, reason: str | None) -> str:
    """What became of the outputs a stopped scan had moved: returned by the scan, or taken over by what ended its
    claim (a disarm ramps every output to zero, an emergency stop zeroes them at once)."""
    if handed_over:
        return (
            f"the {reason or 'end of its claim'} took the outputs over, so the scan did not return them to where it "
            "found them (a disarm ramps every output to zero, an emergency stop zeroes them)"
        )
    if restored:
        return "outputs returned to where it found them"
    return "it moved the outputs back, but some do not hold the codes it found them at"


def _big_step(controller: Controller, plan: ActuatorPlan, settings: ScanSettings, angle: float | None = None) -> float:
    """The second look's step (volts): ``second_look_factor`` times the scan's aim, under the same guards; or, where
    the judgement planned a turn of the actuator's fringe (``angle``, rad: a phase's own, a coupler's coupled-mode
    angle), the step that turns it that far, up to ``look_max_step_volts``."""
    factor = settings.second_look_factor
    bigger = dataclasses.replace(
        settings, kappa_step=factor * settings.kappa_step, phase_step_rad=factor * settings.phase_step_rad
    )
    if angle is not None:
        wanted = angle
        if plan.attribute == "kappa":
            gate = controller.gates.get(plan.gate or "")
            kappa0 = calibrated_kappas(controller).get(plan.gate or "") if gate is not None else None
            if kappa0 is None:
                wanted = 0.0
            else:
                theta = coupling_angle(kappa0)
                # down the fringe (toward 0 V) unless it has no room there
                lower = max(theta - angle, 0.0)
                wanted = abs(kappa0 - math.sin(lower / 2.0) ** 2) if theta - angle >= 0.0 else 0.0
                if wanted == 0.0:
                    wanted = abs(math.sin(min(theta + angle, math.pi) / 2.0) ** 2 - kappa0)
        aim = max(wanted, bigger.kappa_step if plan.attribute == "kappa" else bigger.phase_step_rad)
        best = 0.0
        for _ in range(4):  # the step is sized from the slope at the operating point: correct it by what it did
            planned = dataclasses.replace(
                settings,
                kappa_step=aim,
                phase_step_rad=aim,
                max_step_volts=max(settings.look_max_step_volts, settings.max_step_volts),
            )
            trial = ActuatorPlan(plan.actuator, plan.gate, plan.attribute, plan.code0, plan.volts0)
            _choose_step(controller, trial, planned)
            if trial.step_volts == 0.0 or trial.reason:
                break
            best = trial.step_volts
            done = abs(trial.value_step)
            if done >= 0.95 * wanted or done <= 0.0:
                break
            aim *= min(wanted / done, 4.0)
        if best != 0.0:
            return best
    trial = ActuatorPlan(plan.actuator, plan.gate, plan.attribute, plan.code0, plan.volts0)
    _choose_step(controller, trial, bigger)
    return trial.step_volts


def _suspect(verdict: dict[str, Any]) -> bool:
    """No response, or one that crosstalk from its neighbours could explain: a larger step may tell."""
    return verdict["verdict"] == "no_response" or (
        verdict["verdict"] == "unobservable" and "crosstalk_bound" in verdict["evidence"]
    )


def _neighbour_ids(
    controller: Controller, topology: LatticeTopology | None, plans: dict[str, ActuatorPlan]
) -> dict[str, list[str]]:
    """Each actuator's electrode neighbours (:func:`.scan_paths.neighbours`) among the tested ones."""
    if topology is None:
        return {}
    out: dict[str, list[str]] = {}
    for aid, plan in plans.items():
        if plan.gate is None:
            continue
        ids = []
        for gate, attribute in neighbours(topology, plan.gate, plan.attribute):
            g = controller.gates.get(gate)
            other = None if g is None else (g.coupler if attribute == "kappa" else g.phase)
            if other is not None and other in plans:
                ids.append(other)
        out[aid] = ids
    return out


def _footprint(plans: dict[str, ActuatorPlan], near: dict[str, list[str]], aid: str) -> set[str]:
    """The monitors a step of ``aid`` can move: its own and, through crosstalk, its neighbours'."""
    seen = set(plans[aid].seen_by or ())
    for other in near.get(aid, []):
        seen |= set(plans[other].seen_by or ())
    return seen


def _groups(footprints: dict[str, set[str]]) -> list[list[str]]:
    """Actuators whose steps can move no monitor in common share a second-look frame."""
    groups: list[tuple[list[str], set[str]]] = []
    for aid, seen in footprints.items():
        for members, monitors in groups:
            if seen and not seen & monitors:
                members.append(aid)
                monitors |= seen
                break
        else:
            groups.append(([aid], set(seen)))
    return [members for members, _ in groups]


def _check(control: ScanControl) -> None:
    if control.reason is not None:
        raise StoppedRefused(control.reason)


def _resolve(controller: Controller, targets: list[str] | None) -> list[str]:
    if not targets:
        return list(controller.actuators)
    out: list[str] = []
    for target in targets:
        if target in controller.actuators:
            ids = [target]
        elif target in controller.gates:
            ids = [controller.gates[target].coupler, controller.gates[target].phase]
        else:
            raise UnknownTargetRefused(f"unknown target '{target}' (an actuator or gate id)", target=target)
        out += [a for a in ids if a not in out]
    return out


def _gate_settings(controller: Controller) -> dict[str, str]:
    return {gid: gate_setting(kappa) for gid, kappa in calibrated_kappas(controller).items()}
