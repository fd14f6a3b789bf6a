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
3. a second look, with a step ``second_look_factor`` times larger, at each actuator that showed no
   response (an operating point at an extremum of its effect gives no first-order response, but a
   clear second-order one; a stuck actuator gives neither);
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
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np

from meshwarden.controller import Controller
from meshwarden.errors import MeshwardenError, RefusedError, StoppedRefused, UnknownTargetRefused
from meshwarden.mapping import code_to_volts, volts_to_code
from meshwarden.procedures.designs import PerturbationDesign, estimate_responses, s_matrix_design
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_paths import (
    expected_effect,
    gate_setting,
    incoherent_powers,
    lit_monitors,
    sight,
    upstream_of,
)
from meshwarden.procedures.verdicts import (
    Verdict,
    actuator_verdict,
    dark_monitor_verdict,
    detector_noise_a,
    monitor_verdict,
    noise_threshold,
)

FAULTY = ("no_response", "driver_fault", "drifted")
FROZEN_LSBS = 20.0  # a neighbour's change that a live monitor sharing its light could not hide: common practice


@dataclass(frozen=True)
class ScanSettings:
    """How hard a scan pushes and how it judges (the ``scans:`` section of the configuration)."""

    test_volts: float = 10.0  # no step goes up past this (steps from higher operating points go down)
    max_step_volts: float = 2.0
    kappa_step: float = 0.005  # the calibrated change each step aims for
    phase_step_rad: float = 0.01
    rest_frames: int = 8
    optical_noise_rel: float = 0.01  # lit light wanders this much over the rest frames (drift, laser noise)
    second_look_factor: float = 10.0  # a suspect's second look steps this many times further, for one frame
    integration_s: float = 1e-3
    temperature_k: float = 300.0
    sense_noise_volts: float = 0.005
    dark_current_a: float = 0.0  # the dark level assumed where no unlit monitor shows it
    k_sigma: float = 5.0
    false_alarm: float = 1e-6


@dataclass
class ScanControl:
    """A cooperative stop for a running scan: checked between frames; the scan then returns the outputs
    and ends ``stopped`` (its claim is not stopped, so that it can still move them back)."""

    reason: str | None = None

    def stop(self, reason: str) -> None:
        if self.reason is None:
            self.reason = reason


@dataclass
class _Plan:
    """One actuator's part in a scan."""

    actuator: str
    gate: str | None
    attribute: str
    code0: int
    volts0: float
    step_volts: float = 0.0  # signed, after snapping to a DAC code
    value_step: float = 0.0
    seen_by: frozenset[str] | None = None  # None: no topology, any monitor may see it
    reason: str = ""
    commanded: list[float] = field(default_factory=list)
    sensed: list[float] = field(default_factory=list)


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


def _choose_step(controller: Controller, plan: _Plan, settings: ScanSettings) -> None:
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


def _monitor_noise(controller: Controller, settings: ScanSettings, level_a: float, monitor: Any) -> tuple[float, float]:
    """(expected rms noise of one reading at ``level_a``, one ADC LSB) in amps, for ``monitor``."""
    board = controller.boards[monitor.input.board]
    bits = controller.config.rack.board(monitor.input.board).adc_bits
    full_scale_v = board.identity.adc_full_scale_volts if board.identity is not None else 0.0
    lsb_a = full_scale_v / (1 << bits) / monitor.transimpedance_ohms
    bandwidth = 1.0 / (2.0 * settings.integration_s)  # integrate-and-dump, B = 1/(2T) (standard)
    noise = detector_noise_a(
        max(level_a, 0.0), 0.0, bandwidth, monitor.transimpedance_ohms, settings.temperature_k, lsb_a
    )
    return noise, lsb_a


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
        plans[aid] = _Plan(aid, gate, attribute, code0, _volts(controller, aid, code0))
    settings_of = _gate_settings(controller)
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
    design = s_matrix_design(len(optical)) if optical else None

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
                first = _judge(
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
                    blame=False,
                )
                suspects = [a for a in optical if first["actuators"][a]["verdict"] == "no_response"]
                for group in _groups(suspects, plans):
                    _check(control)
                    big = {a: plans[a].volts0 + _big_step(controller, plans[a], settings) for a in group}
                    big = {a: v for a, v in big.items() if v != plans[a].volts0}
                    if not big:
                        continue
                    # rest, stepped, rest again: the light drifts meanwhile, and a straight drift cancels
                    before = await frame({}, monitors=True, sense=False) or {}
                    after = await frame(big, monitors=True) or {}
                    back = await frame({a: plans[a].volts0 for a in big}, monitors=True, sense=False) or {}
                    extra_frames += 3
                    for aid in big:
                        second_look[aid] = {m: after[m] - (before[m] + back[m]) / 2 for m in after}
                        act = controller.actuators[aid]
                        big_value[aid] = act.map.value_at(big[aid]) - act.map.value_at(plans[aid].volts0)
            if sense_only:
                _check(control)
                await frame({a: plans[a].volts0 + plans[a].step_volts for a in sense_only}, monitors=False)
            tick()
        except StoppedRefused as exc:
            stopped = exc.message
        finally:
            if not claim.ended and not claim.stopping:  # disarm and estop take the outputs over
                await claim.move(home, volts=True, journal=False)
            final_codes = {a: int(controller.describe(a)["code"]) for a in tested}
            tick()
    if stopped is not None:
        raise StoppedRefused(f"scan stopped: {stopped}; outputs returned to where it found them")
    restored = all(final_codes[a] == plans[a].code0 for a in tested)
    earlier = (reference or {}).get("actuators", {}) if same_point else {}
    report = _judge(
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
    )
    report["frames"] = len(rest) + len(frames) + extra_frames
    report["outputs_restored"] = restored
    report["actuators_tested"] = len(tested)
    report["layout"] = topology.as_dict() if topology is not None else None
    report["gates"] = {g: {"coupler": gate.coupler, "phase": gate.phase} for g, gate in controller.gates.items()}
    report["operating_codes"] = operating_codes
    report["compared_with_reference"] = bool(earlier)
    return report


def _big_step(controller: Controller, plan: _Plan, settings: ScanSettings) -> float:
    """The second look's step (volts): ``second_look_factor`` times the scan's aim, under the same guards."""
    factor = settings.second_look_factor
    bigger = dataclasses.replace(
        settings, kappa_step=factor * settings.kappa_step, phase_step_rad=factor * settings.phase_step_rad
    )
    trial = _Plan(plan.actuator, plan.gate, plan.attribute, plan.code0, plan.volts0)
    _choose_step(controller, trial, bigger)
    return trial.step_volts


def _groups(suspects: list[str], plans: dict[str, _Plan]) -> list[list[str]]:
    """Suspects that no monitor sees in common share a second-look frame."""
    groups: list[tuple[list[str], set[str]]] = []
    for aid in suspects:
        seen = set(plans[aid].seen_by or ())
        for members, monitors in groups:
            if seen and not seen & monitors:
                members.append(aid)
                monitors |= seen
                break
        else:
            groups.append(([aid], seen))
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


def _kappas(controller: Controller) -> dict[str, float | None]:
    """Each gate's calibrated coupling at its coupler's present output (None where the calibration has none)."""
    out: dict[str, float | None] = {}
    for gid, gate in controller.gates.items():
        act = controller.actuators[gate.coupler]
        try:
            out[gid] = act.map.value_at(float(controller.describe(gate.coupler)["volts"]))
        except MeshwardenError:
            out[gid] = None
    return out


def _gate_settings(controller: Controller) -> dict[str, str]:
    return {gid: gate_setting(kappa) for gid, kappa in _kappas(controller).items()}


def _judge(
    controller: Controller,
    settings: ScanSettings,
    topology: LatticeTopology | None,
    settings_of: dict[str, str],
    plans: dict[str, _Plan],
    untested: list[str],
    rest: list[dict[str, float]],
    frames: list[dict[str, float]],
    design: PerturbationDesign | None,
    optical: list[str],
    second_look: dict[str, dict[str, float]] | None = None,
    big_value_step: dict[str, float] | None = None,
    earlier: dict[str, Any] | None = None,
    *,
    blame: bool = True,
) -> dict[str, Any]:
    monitors = {m.id: m for m in controller.config.chip.monitors}
    names = list(monitors)
    rest_a = np.array([[r[m] for m in names] for r in rest])
    frame_a = np.array([[f[m] for m in names] for f in frames]) if frames else np.zeros((0, len(names)))
    noise = {
        m: _monitor_noise(controller, settings, float(rest_a[:, i].mean()), monitors[m]) for i, m in enumerate(names)
    }

    # responses (amps per design step) and their standard errors, actuators x monitors
    responses = np.zeros((len(optical), len(names)))
    se = np.ones((len(optical), len(names)))
    sigma = np.array([noise[m][0] for m in names])
    short_sigma = _frame_sigma(rest_a, None, None, None, None, list(sigma))  # back-to-back frames: no drift
    if design is not None:
        responses, rest_level = estimate_responses(design, frame_a, 1.0)
        factors = np.sqrt(design.variance_factors())
        sigma = _frame_sigma(rest_a, frame_a, design, responses, rest_level, [noise[m][0] for m in names])
        se = np.outer(factors, sigma)
    significant = np.abs(responses) >= settings.k_sigma * se
    samples = rest_a.shape[0]
    quiet = [
        samples < 2 or float(rest_a[:, i].std(ddof=1)) <= noise_threshold(noise[m][0], samples, settings.false_alarm)
        for i, m in enumerate(names)
    ]

    # monitors
    lit = lit_monitors(topology, settings_of) if topology is not None else None
    full_scale = {m: noise[m][1] * (1 << controller.config.rack.board(monitors[m].input.board).adc_bits) for m in names}
    dark_verdicts: dict[str, Verdict] = {}
    for i, m in enumerate(names):
        if lit is not None and m not in lit:
            dark_verdicts[m] = _dark(rest_a[:, i], full_scale[m], noise[m][0], settings)
    healthy_dark = [names.index(m) for m, v in dark_verdicts.items() if v.verdict == "ok"]
    if healthy_dark:
        dark_ref = rest_a[:, healthy_dark].mean(axis=1)
        dark_source = "the unlit monitors' mean"
    else:
        dark_ref = np.full(rest_a.shape[0], settings.dark_current_a)
        dark_source = "the configured dark current"
    weak, scale = _weakly_lit(controller, topology, lit, names, rest_a, dark_ref, noise, settings)
    kappas = _kappas(controller)
    monitor_out: dict[str, Verdict] = {}
    for i, m in enumerate(names):
        if m in dark_verdicts:
            monitor_out[m] = dark_verdicts[m]
            continue
        if m in weak:
            level = float(rest_a[:, i].mean())
            monitor_out[m] = dark_monitor_verdict(
                dark_a=rest_a[:, i],
                full_scale_a=full_scale[m],
                dark_noise_a=math.hypot(noise[m][0], settings.optical_noise_rel * level),
                false_alarm=settings.false_alarm,
                unlit_reason="too little light is expected here (light summed in power) to test it for dead or frozen",
            )
            continue
        if lit is None and rest_a[:, i].mean() - dark_ref.mean() < settings.k_sigma * noise[m][0]:
            monitor_out[m] = _dark(rest_a[:, i], full_scale[m], noise[m][0], settings)
            continue
        # frozen needs evidence: an actuator this monitor should see moved another quiet monitor that sees it too
        watchers = [j for j, a in enumerate(optical) if m in (plans[optical[j]].seen_by or ())]
        # ... by several of this monitor's LSBs (light shared between outputs moves both by similar amounts)
        neighbours = any(
            significant[j, k] and abs(responses[j, k]) >= FROZEN_LSBS * noise[m][1]
            for j in watchers
            for k, other in enumerate(names)
            if k != i and quiet[k] and other in (plans[optical[j]].seen_by or ())
        )
        dark_noise, lsb = _monitor_noise(controller, settings, float(dark_ref.mean()), monitors[m])
        monitor_out[m] = monitor_verdict(
            dark_a=dark_ref if dark_ref.size >= 2 else np.repeat(dark_ref, 2),
            lit_a=rest_a[:, i],
            frame_levels_a=frame_a[:, i] if frames else rest_a[:, i],
            full_scale_a=full_scale[m],
            dark_noise_a=dark_noise,
            lit_noise_a=math.hypot(noise[m][0], settings.optical_noise_rel * float(rest_a[:, i].mean())),
            neighbours_changed=neighbours,
            adc_lsb_a=lsb,
            k_sigma=settings.k_sigma,
            false_alarm=settings.false_alarm,
        )
    usable = {m for m, v in monitor_out.items() if v.verdict == "ok" and (lit is None or m in lit) and m not in weak}

    # actuators
    actuator_out: dict[str, Verdict] = {a: actuator_verdict(readable=False) for a in untested}
    seen_at: dict[str, str] = {}
    for aid, plan in plans.items():
        act = controller.actuators[aid]
        common = partial(
            actuator_verdict,
            readable=True,
            commanded_volts=plan.commanded,
            sense_volts=plan.sensed,
            lsb_volts=act.limit.lsb_volts,
            sense_noise_volts=settings.sense_noise_volts,
            k_sigma=settings.k_sigma,
        )
        if aid not in optical:
            actuator_out[aid] = common(unobservable_reason=plan.reason or "no monitor can see it")
            continue
        j = optical.index(aid)
        candidates = [k for k, m in enumerate(names) if m in usable and (plan.seen_by is None or m in plan.seen_by)]
        if not candidates:
            why = "every monitor that can see it is faulty or dim" if plan.seen_by else "no healthy lit monitor"
            actuator_out[aid] = common(unobservable_reason=why)
            continue
        best = max(candidates, key=lambda k: abs(responses[j, k]) / se[j, k])
        before = (earlier or {}).get(aid, {})
        predicted = None
        if before.get("verdict") == "ok" and before.get("monitor") in names:
            same_step = abs(before["evidence"].get("step_volts", math.nan) - plan.step_volts) < 1e-9
            if same_step and names.index(before["monitor"]) in candidates and "response" in before["evidence"]:
                best = names.index(before["monitor"])  # judged where it was seen last time, against what it did
                predicted = float(before["evidence"]["response"])
        seen_at[aid] = names[best]
        verdict = common(response=float(responses[j, best]), response_se=float(se[j, best]), predicted=predicted)
        evidence = verdict.evidence | {"step_volts": plan.step_volts, "value_step": plan.value_step}
        look = (second_look or {}).get(aid)
        verdict = Verdict(verdict.verdict, verdict.reason, evidence)
        if verdict.verdict == "no_response" and look is not None:
            moved = max(abs(look[names[k]]) / (math.sqrt(1.5) * short_sigma[k]) for k in candidates)
            evidence["second_look_sigmas"] = moved
            if moved >= settings.k_sigma:
                verdict = Verdict(
                    "ok",
                    f"no first-order response here (its operating point sits near an extremum of its effect), but a "
                    f"larger step moved the light by {moved:.3g} sigma: it works",
                    evidence,
                )
        if verdict.verdict == "no_response" and topology is None:
            verdict = Verdict(
                "unobservable",
                "no monitor responded, and without the lattice topology a stuck actuator cannot be told from one no "
                "monitor sees",
                evidence,
            )
        elif verdict.verdict == "no_response" and topology is not None and scale is not None:
            # would a working actuator have shown? (generous, power-summed estimate of its effect)
            effect = expected_effect(topology, kappas, str(plan.gate), plan.attribute)
            big = abs((big_value_step or {}).get(aid, 0.0))
            visible = max(
                max(
                    scale * effect.get(names[k], 0.0) * abs(plan.value_step) / se[j, k],
                    scale * effect.get(names[k], 0.0) * big / (math.sqrt(1.5) * short_sigma[k]),
                )
                for k in candidates
            )
            evidence["expected_sigmas"] = visible
            if visible < DETECTABLE * settings.k_sigma:
                verdict = Verdict(
                    "unobservable",
                    f"a working actuator would show at most {visible:.3g} sigma here: too little light meets it to "
                    "tell",
                    evidence,
                )
        actuator_out[aid] = verdict
    if topology is not None and blame:
        _blame_upstream(topology, settings_of, plans, actuator_out)
    return {
        "actuators": {
            a: v.as_dict() | ({"monitor": seen_at[a]} if a in seen_at else {}) for a, v in sorted(actuator_out.items())
        },
        "monitors": {m: v.as_dict() for m, v in monitor_out.items()},
        "design": {"kind": design.kind if design else "none", "actuators": len(optical)},
        "dark_reference": dark_source,
        "topology": topology is not None,
    }


DETECTABLE = 10.0  # a no_response needs a working actuator's expected effect at this many detection limits
WEAK_LIGHT = 100.0  # expected light below this many dead-thresholds: too little to call a monitor dead


def _weakly_lit(
    controller: Controller,
    topology: LatticeTopology | None,
    lit: set[str] | None,
    names: list[str],
    rest_a: Any,
    dark_ref: Any,
    noise: dict[str, tuple[float, float]],
    settings: ScanSettings,
) -> tuple[set[str], float | None]:
    """Lit monitors whose expected light (power-summed estimate, scaled by what the lit monitors read) is too
    small to tell a dead detector from a dim tap; and that scale (amps per unit of input light)."""
    if topology is None or lit is None:
        return set(), None
    expected = incoherent_powers(topology, _kappas(controller))
    above = rest_a.mean(axis=0) - float(dark_ref.mean())
    ratios = [
        above[i] / expected[m]
        for i, m in enumerate(names)
        if m in lit and expected.get(m, 0.0) > 0.0 and above[i] > settings.k_sigma * noise[m][0]
    ]
    if not ratios:
        return set(lit), None
    scale = float(np.median(ratios))
    return {m for m in lit if scale * expected.get(m, 0.0) < WEAK_LIGHT * settings.k_sigma * noise[m][0]}, scale


def _frame_sigma(
    rest_a: Any, frame_a: Any, design: PerturbationDesign | None, responses: Any, rest_level: Any, model: list[float]
) -> Any:
    """Per monitor, the rms noise of one frame: the detector model, or more where the frames show more.

    Evidence of more: successive differences of the back-to-back rest frames (var = 2 sigma^2 for white
    noise), and the residuals of the design's fit where spare columns leave at least 4 degrees of freedom
    (they also hold the slow drift over the whole design).
    """
    sigma = np.asarray(model, dtype=float)
    if rest_a.shape[0] >= 3:
        sigma = np.maximum(sigma, np.sqrt(np.mean(np.diff(rest_a, axis=0) ** 2, axis=0) / 2.0))
    dof = design.frames - 1 - design.actuators if design is not None else 0
    if design is not None and dof >= 4:
        fitted = rest_level + design.matrix() @ responses
        sigma = np.maximum(sigma, np.sqrt(np.sum((frame_a - fitted) ** 2, axis=0) / dof))
    return sigma


def _dark(samples: Any, full_scale_a: float, noise_a: float, settings: ScanSettings) -> Verdict:
    return dark_monitor_verdict(
        dark_a=samples, full_scale_a=full_scale_a, dark_noise_a=noise_a, false_alarm=settings.false_alarm
    )


def _blame_upstream(
    topology: LatticeTopology, settings_of: dict[str, str], plans: dict[str, _Plan], verdicts: dict[str, Verdict]
) -> None:
    """An actuator without response whose light passes a faulty one first cannot be judged: its light was changed."""
    faulty = [a for a, v in verdicts.items() if v.verdict in FAULTY and a in plans]
    for aid, verdict in list(verdicts.items()):
        plan = plans.get(aid)
        if plan is None or plan.gate is None or verdict.verdict != "no_response":
            continue
        culprits = [
            f
            for f in faulty
            if f != aid
            and plans[f].gate is not None
            and upstream_of(topology, settings_of, str(plans[f].gate), plans[f].attribute, plan.gate, plan.attribute)
        ]
        if culprits:
            verdicts[aid] = Verdict(
                "unobservable",
                f"its light passes {', '.join(sorted(culprits))}, found faulty, so its own response cannot be judged",
                verdict.evidence,
            )
