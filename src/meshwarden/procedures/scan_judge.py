"""The fault scan's verdicts: from a scan's frames and looks to a verdict per actuator and monitor.

What a scan measured (:mod:`.scan_run` takes the frames) is judged here: noise and dark reference, monitors
(with the conservation looks that tell a dead or frozen tap from a dim one), then actuators (responses against
their neighbours' crosstalk, second looks, and whether a working one could have hidden). The rules and their
sources are in docs/procedures.md (the fault scan) and in :mod:`.scan_attribution`, :mod:`.scan_paths` and
:mod:`.verdicts`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np

from meshwarden.controller import Controller
from meshwarden.errors import MeshwardenError
from meshwarden.procedures.designs import PerturbationDesign, estimate_responses
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_attribution import (
    amplitude_of,
    angle_step,
    coupling_angle,
    crosstalk_bounds,
    estimate_share,
    least_sigmas,
    mixer_phase_sigmas,
    offset_fringe_sigmas,
)
from meshwarden.procedures.scan_paths import (
    Cone,
    conservation_cone,
    expected_effect,
    incoherent_powers,
    input_readings,
    lit_monitors,
    swing_taps,
    tapped_outputs,
    unmixed,
    upstream_of,
)
from meshwarden.procedures.verdicts import (
    Verdict,
    actuator_verdict,
    conserved_light_check,
    dark_monitor_verdict,
    detector_noise_a,
    monitor_verdict,
)

FAULTY = ("no_response", "driver_fault", "drifted")


@dataclass(frozen=True)
class ScanSettings:
    """How hard a scan pushes and how it judges (the ``scans:`` section of the configuration)."""

    test_volts: float = 10.0  # no step goes up past this (steps from higher operating points go down)
    max_step_volts: float = 2.0
    kappa_step: float = 0.005  # the calibrated change each step aims for
    phase_step_rad: float = 0.01
    rest_frames: int = 8
    optical_noise_rel: float = 0.01  # lit light wanders this much over the rest frames (drift, laser noise)
    second_look_factor: float = 30.0  # a suspect's second look steps this many times further, for one frame
    integration_s: float = 1e-3
    temperature_k: float = 300.0
    sense_noise_volts: float = 0.005
    dark_current_a: float = 0.0  # the dark level assumed where no unlit monitor shows it
    k_sigma: float = 5.0
    false_alarm: float = 1e-6
    # the largest share of a neighbouring electrode's V^2 that acts on an actuator (a bound on the chip layout's
    # crosstalk; the response a stuck actuator's step can borrow from its neighbours is judged against it)
    crosstalk_share_max: float = 0.05
    loss_floor: float = 0.5  # the least share of conserved light a tap receives (paths differ by < 3 dB)
    path_loss_db_max: float = 0.5  # the most two taps of one coupler's outputs differ in path loss (a phase arm's)
    look_max_step_volts: float = 10.0  # the largest step of a second look planned to turn a fringe far enough


@dataclass
class ActuatorPlan:
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


LOOK_SPREAD = math.sqrt(14.0 / 9.0)  # a look's change over one frame's noise: y - (2 a + b) / 3 or y - (a + 2 b) / 3
LOOK_DEPTH = 2  # couplers tried before a doubtful monitor's tap: the last on its mode, and the one before


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


def calibrated_kappas(controller: Controller) -> dict[str, float | None]:
    """Each gate's calibrated coupling at its coupler's present output (None where the calibration has none)."""
    out: dict[str, float | None] = {}
    for gid, gate in controller.gates.items():
        act = controller.actuators[gate.coupler]
        try:
            out[gid] = act.map.value_at(float(controller.describe(gate.coupler)["volts"]))
        except MeshwardenError:
            out[gid] = None
    return out


def judge_scan(
    controller: Controller,
    settings: ScanSettings,
    topology: LatticeTopology | None,
    settings_of: dict[str, str],
    plans: dict[str, ActuatorPlan],
    untested: list[str],
    rest: list[dict[str, float]],
    frames: list[dict[str, float]],
    design: PerturbationDesign | None,
    optical: list[str],
    second_look: dict[str, dict[str, float]] | None = None,
    big_value_step: dict[str, float] | None = None,
    earlier: dict[str, Any] | None = None,
    *,
    near: dict[str, list[str]] | None = None,
    big_dv2: dict[str, float] | None = None,
    half_look: tuple[dict[str, dict[str, float]], dict[str, float], dict[str, float]] | None = None,
    blame: bool = True,
) -> dict[str, Any]:
    """The report's verdicts from a scan's rest frames, design frames and looks (``blame=False``: a first pass
    that picks the suspects for second looks)."""
    monitors = {m.id: m for m in controller.config.chip.monitors}
    names = list(monitors)
    rest_a = np.array([[r[m] for m in names] for r in rest])
    frame_a = np.array([[f[m] for m in names] for f in frames]) if frames else np.zeros((0, len(names)))
    noise = {
        m: _monitor_noise(controller, settings, float(rest_a[:, i].mean()), monitors[m]) for i, m in enumerate(names)
    }
    looks = second_look or {}

    # responses (amps per design step) and their standard errors, actuators x monitors
    responses = np.zeros((len(optical), len(names)))
    se = np.ones((len(optical), len(names)))
    sigma = np.array([noise[m][0] for m in names])
    # a look's frames, like the design's, are spaced by moves and their dwell: the light drifts between them as it
    # does between design frames, so a look is judged by the design's per-frame noise (rest frames, taken back to
    # back, see less of the drift)
    look_sigma = _frame_sigma(rest_a, None, None, None, None, list(sigma))
    if design is not None:
        responses, rest_level = estimate_responses(design, frame_a, 1.0)
        factors = np.sqrt(design.variance_factors())
        sigma = _frame_sigma(rest_a, frame_a, design, responses, rest_level, [noise[m][0] for m in names])
        se = np.outer(factors, sigma)
        look_sigma = sigma
    # what each actuator's step could borrow from its neighbours through crosstalk (amps per V^2 of its own step)
    dv2 = [(plans[a].volts0 + plans[a].step_volts) ** 2 - plans[a].volts0 ** 2 for a in optical]
    index = {a: j for j, a in enumerate(optical)}
    shares = _crosstalk_shares(plans, optical, near or {}, names, responses, se, dv2, settings)
    near_index = [
        [(index[n], shares[plans[a].gate == plans[n].gate][0]) for n in (near or {}).get(a, []) if n in index]
        for a in optical
    ]
    borrowed = crosstalk_bounds(responses, se, dv2, near_index, settings.k_sigma)

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
    kappas = calibrated_kappas(controller)
    above_dark = {m: max(float(rest_a[:, i].mean() - dark_ref.mean()), 0.0) for i, m in enumerate(names)}
    dark_noise = {m: _monitor_noise(controller, settings, float(dark_ref.mean()), monitors[m])[0] for m in names}
    # a monitor whose readings sit at the dark level, or never left one ADC step, is in doubt: dead, frozen, or
    # just dim; only light it should have seen move can tell (a look at the coupler before its tap)
    doubtful = set()
    darkish = set()  # doubtful and reading no light: dead unless a look showed it alive
    for i, m in enumerate(names):
        if m in dark_verdicts or topology is None:
            continue
        readings = np.concatenate([rest_a[:, i], frame_a[:, i]]) if frames else rest_a[:, i]
        at_dark = float(rest_a[:, i].mean() - dark_ref.mean()) < settings.k_sigma * dark_noise[m]
        saturated = float(readings.max()) >= 0.98 * full_scale[m]
        if not saturated and (at_dark or float(readings.max() - readings.min()) <= noise[m][1]):
            doubtful.add(m)
            if at_dark:
                darkish.add(m)
    cones: dict[str, list[Cone]] = {}
    for m in sorted(doubtful):
        if topology is None:
            break
        found = [conservation_cone(topology, m, depth) for depth in range(LOOK_DEPTH)]
        cones[m] = [c for c in found if c.gate] or found[:1]
    monitor_looks = {
        m: [
            c.gate
            for c in found
            if not c.reason and c.gate in controller.gates and controller.gates[c.gate].coupler in plans
        ]
        for m, found in cones.items()
    }
    # a look's change (one reading minus the mean of two) is off by less than one ADC step from rounding, plus k
    # sigma of the noise that is not rounding: the detector's shot and resistor noise, or what the rest frames show
    bandwidth = 1.0 / (2.0 * settings.integration_s)
    unrounded = [
        max(
            detector_noise_a(
                max(float(rest_a[:, i].mean()), 0.0),
                0.0,
                bandwidth,
                monitors[m].transimpedance_ohms,
                settings.temperature_k,
            ),
            float(np.sqrt(np.mean(np.diff(rest_a[:, i]) ** 2) / 2.0)) if rest_a.shape[0] >= 3 else 0.0,
            _residual_sigma(design, frame_a[:, i]),
        )
        for i, m in enumerate(names)
    ]
    # (rounding bound, k sigma of the rest): bounds add, independent noises add in quadrature
    uncertainty = {m: (noise[m][1], settings.k_sigma * LOOK_SPREAD * unrounded[i]) for i, m in enumerate(names)}
    monitor_out: dict[str, Verdict] = {}
    for i, m in enumerate(names):
        level = float(rest_a[:, i].mean())
        lit_noise = math.hypot(noise[m][0], settings.optical_noise_rel * level)
        if m in dark_verdicts:
            monitor_out[m] = dark_verdicts[m]
            continue
        if lit is None and level - dark_ref.mean() < settings.k_sigma * noise[m][0]:
            monitor_out[m] = _dark(rest_a[:, i], full_scale[m], noise[m][0], settings)
            continue
        plain = monitor_verdict(
            dark_a=dark_ref if dark_ref.size >= 2 else np.repeat(dark_ref, 2),
            lit_a=rest_a[:, i],
            frame_levels_a=frame_a[:, i] if frames else rest_a[:, i],
            full_scale_a=full_scale[m],
            dark_noise_a=dark_noise[m],
            lit_noise_a=lit_noise,
            neighbours_changed=False,
            adc_lsb_a=noise[m][1],
            k_sigma=settings.k_sigma,
            false_alarm=settings.false_alarm,
        )
        if m not in doubtful or plain.verdict == "saturated":
            monitor_out[m] = plain
            continue
        monitor_out[m] = _doubtful_monitor(
            m,
            rest_a[:, i],
            full_scale[m],
            lit_noise,
            settings,
            cones.get(m),
            looks,
            controller,
            monitors,
            doubtful,
            uncertainty,
            level - float(dark_ref.mean()) < settings.k_sigma * dark_noise[m],
            _known_pair_light(topology, settings_of, kappas, scale, big_value_step or {}, controller, darkish),
        )
    usable = {
        m
        for m, v in monitor_out.items()
        if v.verdict == "ok"
        and (lit is None or m in lit)
        and m not in weak
        and not (m in darkish and v.reason)  # a dark reading no look proved alive shows nothing
    }

    trusted = {m for m, v in monitor_out.items() if v.verdict == "ok" and not v.reason}  # judged, and fully

    # actuators
    # The judgements from the readings around a coupler need the couplings and the value steps as they really
    # are: only tables measured on this chip are trusted for them (a design-nominal table may be 0.5 off).
    measured = frozenset(a for a, act in controller.actuators.items() if act.calibration_origin == "measured")
    measured_kappas = {g: (k if controller.gates[g].coupler in measured else None) for g, k in kappas.items()}
    around_us = (
        Around(
            topology,
            measured_kappas,
            names,
            monitors,
            trusted,
            rest_a,
            float(dark_ref.mean()),
            look_sigma,
            settings,
            measured,
        )
        if topology is not None
        else None
    )
    actuator_out: dict[str, Verdict] = {a: actuator_verdict(readable=False) for a in untested}
    seen_at: dict[str, str] = {}
    mixer_checks: dict[str, str] = {}  # a phase judged at the coupler where it acts: that coupler's gate
    look_angles: dict[str, float] = {}  # first pass: the turn a suspect's second look should take
    fallback: dict[str, Verdict] = {}
    self_judged: set[str] = set()  # judged from what its own coupler's taps read: light changed upstream is measured
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
        own_xt = borrowed[j] * abs(dv2[j])  # the most its step could move each monitor through its neighbours
        best = max(candidates, key=lambda k: (abs(responses[j, k]) - own_xt[k]) / se[j, k])
        if abs(responses[j, best]) - own_xt[best] < settings.k_sigma * se[j, best]:
            # nothing clear of its neighbours' crosstalk: judge where it moved the light most
            best = max(candidates, key=lambda k: abs(responses[j, k]) / se[j, k])
        before = (earlier or {}).get(aid, {})
        predicted = None
        if before.get("verdict") == "ok" and before.get("monitor") in names:
            same_step = abs(before["evidence"].get("step_volts", math.nan) - plan.step_volts) < 1e-9
            if same_step and names.index(before["monitor"]) in candidates and "response" in before["evidence"]:
                best = names.index(before["monitor"])  # judged where it was seen last time, against what it did
                predicted = float(before["evidence"]["response"])
        seen_at[aid] = names[best]
        verdict = common(
            response=float(responses[j, best]),
            response_se=float(se[j, best]),
            predicted=predicted,
            crosstalk_bound=float(own_xt[best]),
        )
        evidence = verdict.evidence | {"step_volts": plan.step_volts, "value_step": plan.value_step}
        look = looks.get(aid)
        verdict = Verdict(verdict.verdict, verdict.reason, evidence)
        doubted = verdict.verdict == "no_response" or (
            verdict.verdict == "unobservable" and "crosstalk_bound" in evidence
        )
        if doubted and look is not None:
            halves, _, half_dv2s = half_look or ({}, {}, {})
            pairs = [(look, abs((big_dv2 or {}).get(aid, 0.0)))]
            if aid in halves:
                pairs.append((halves[aid], abs(half_dv2s.get(aid, 0.0))))
            moved = max(
                (abs(seen[names[k]]) - borrowed[j, k] * dv2_look) / (LOOK_SPREAD * look_sigma[k])
                for seen, dv2_look in pairs
                for k in candidates
            )
            evidence["second_look_sigmas"] = moved
            if moved >= settings.k_sigma:
                verdict = Verdict(
                    "ok",
                    f"no first-order response here (its operating point sits near an extremum of its effect), but a "
                    f"larger step moved the light by {moved:.3g} sigma beyond what its neighbours' crosstalk could: "
                    "it works",
                    evidence,
                )
            raw = max(abs(seen[names[k]]) / (LOOK_SPREAD * look_sigma[k]) for seen, _ in pairs for k in candidates)
            if verdict.verdict == "no_response" and raw >= settings.k_sigma:
                verdict = Verdict(
                    "unobservable",
                    f"its larger step moved the light by {raw:.3g} sigma, but no more than its neighbours could "
                    "through crosstalk: it cannot be told from a stuck one",
                    evidence,
                )
        if verdict.verdict == "no_response" and topology is None:
            verdict = Verdict(
                "unobservable",
                "no monitor responded, and without the lattice topology a stuck actuator cannot be told from one no "
                "monitor sees",
                evidence,
            )
        tapped = None
        upgrade: Verdict | None = None  # no_response on the evidence of the readings where it acts
        upgrade_effect = ""
        if verdict.verdict == "no_response" and around_us is not None and second_look is not None:
            halves, half_values, _ = half_look or ({}, {}, {})
            # (value step, its standard error per monitor): the design's own step first, then the second looks
            # the neighbours' crosstalk reaches the taps of a phase's mixing coupler (its own gate's coupler changes
            # the light on its arm), never those of a coupler's own outputs (no neighbour acts on those modes)
            reach = 0.0 if plan.attribute == "kappa" else 1.0
            tapped_steps = [(plan.value_step, se[j], reach * borrowed[j] * abs(dv2[j]))]
            if aid in looks and big_value_step and aid in big_value_step:
                big_xt = reach * borrowed[j] * abs((big_dv2 or {}).get(aid, 0.0))
                tapped_steps.append((big_value_step[aid], LOOK_SPREAD * np.asarray(look_sigma), big_xt))
            if aid in halves and aid in half_values:
                half_xt = reach * borrowed[j] * abs((half_look or ({}, {}, {}))[2].get(aid, 0.0))
                tapped_steps.append((half_values[aid], LOOK_SPREAD * np.asarray(look_sigma), half_xt))
            fringe = _tapped_fringe(around_us, plan, [names[k] for k in candidates])
            if fringe is not None:
                shown, found_evidence = _tapped_sigmas(fringe, plan, kappas, names, tapped_steps)
                tapped = (shown, found_evidence, (fringe.upper, fringe.lower), fringe.effect)
            if tapped is None or tapped[0] < DETECTABLE * settings.k_sigma:
                zero = np.zeros(len(names))
                look_data = LookData([plan.value_step], [responses[j]], [se[j]], [borrowed[j] * abs(dv2[j])])
                if aid in looks and big_value_step and aid in big_value_step:
                    look_data.values.append(big_value_step[aid])
                    look_data.changes.append(np.array([looks[aid].get(m, 0.0) for m in names]))
                    look_data.sigmas.append(LOOK_SPREAD * np.asarray(look_sigma))
                    look_data.crosstalk.append(borrowed[j] * abs((big_dv2 or {}).get(aid, 0.0)))
                if aid in halves and aid in half_values:
                    look_data.values.append(half_values[aid])
                    look_data.changes.append(np.array([halves[aid].get(m, 0.0) for m in names]))
                    look_data.sigmas.append(LOOK_SPREAD * np.asarray(look_sigma))
                    look_data.crosstalk.append(borrowed[j] * abs((half_look or ({}, {}, {}))[2].get(aid, 0.0)) + zero)
                around = _around_sigmas(around_us, plan, [names[k] for k in candidates], look_data)
                if around is not None:
                    evidence |= around[1]
                    if around[0] >= DETECTABLE * settings.k_sigma:
                        upgrade = Verdict(
                            "no_response",
                            f"no look moved the readings of the coupler where it acts ({around[2]}: inputs, then "
                            f"outputs); from the light its inputs bring, a working one would have shown at least "
                            f"{around[0]:.3g} sigma in one look at any operating point",
                            evidence,
                        )
                        upgrade_effect = around[3]
        elif doubted and around_us is not None and second_look is None:
            fringe = _tapped_fringe(around_us, plan, [names[k] for k in candidates])
            if fringe is not None:
                look_angles[aid] = _planned_look_angle(
                    fringe, names, look_sigma, LOOK_MARGIN * DETECTABLE * settings.k_sigma
                )
            else:
                zero = np.zeros(len(names))
                wide = LOOK_SPREAD * np.asarray(look_sigma)
                for angle in np.arange(0.3, 1.5001, 0.05):
                    values = [_value_for_angle(plan, kappas, a) for a in (angle / 2.0, angle)]
                    trial = _around_sigmas(
                        around_us,
                        plan,
                        [names[k] for k in candidates],
                        LookData(values, [zero] * 2, [wide] * 2, [zero] * 2),
                    )
                    if trial is None:
                        break
                    look_angles[aid] = float(angle)
                    if trial[0] >= LOOK_MARGIN * DETECTABLE * settings.k_sigma:
                        break
        if tapped is not None:
            evidence |= tapped[1]
        if tapped is not None and tapped[0] >= DETECTABLE * settings.k_sigma:
            upper, lower = tapped[2]
            upgrade = Verdict(
                "no_response",
                f"no look moved the light at {upper} and {lower}, the taps of both outputs of the coupler where it "
                f"acts; from what they read, a working one would have shown at least {tapped[0]:.3g} sigma in one "
                "look whatever the phase of the light it meets",
                evidence,
            )
            upgrade_effect = tapped[3]
        if verdict.verdict == "no_response" and topology is not None and scale is not None and second_look is not None:
            # would a working actuator have shown? Its first look showed nothing, so if it works its operating point
            # sits at an extremum, where only the second look's second-order change shows (generous estimate)
            effect = expected_effect(topology, kappas, str(plan.gate), plan.attribute)
            big = (big_value_step or {}).get(aid)
            visible = 0.0
            if big is not None:
                kappa = kappas.get(str(plan.gate))
                halves, half_values, _ = half_look or ({}, {}, {})
                steps = (angle_step(plan.attribute, plan.value_step, kappa), angle_step(plan.attribute, big, kappa))
                half = angle_step(plan.attribute, half_values.get(aid, 0.0), kappa) if aid in halves else None
                visible = max(
                    least_sigmas(
                        min(
                            amplitude_of(plan.attribute, scale * effect.get(names[k], 0.0), kappa),
                            _swing_cap(topology, kappas, plan, names[k], above_dark, monitors, trusted),
                        ),
                        # crosstalk adds to a working actuator's change in proportion to its V^2 step, while its own
                        # change at the least favourable operating point grows as the square of the step: the two
                        # cannot cancel in both looks at once, so nothing is taken off here
                        [(steps[0], 0.0, se[j, k]), (steps[1], 0.0, LOOK_SPREAD * look_sigma[k])]
                        + ([] if half is None else [(half, 0.0, LOOK_SPREAD * look_sigma[k])]),
                    )
                    for k in candidates
                )
            evidence["expected_sigmas"] = visible
            if not unmixed(topology, settings_of, str(plan.gate), plan.attribute):
                verdict = Verdict(
                    "unobservable",
                    "the light it acts on has already interfered with other light, so how much of it meets this "
                    "actuator is unknown: a working one could show nothing here",
                    evidence,
                )
            elif visible < DETECTABLE * settings.k_sigma:
                verdict = Verdict(
                    "unobservable",
                    f"at the least favourable operating point a working actuator would show only {visible:.3g} sigma "
                    "in its two looks: too little light meets it to tell",
                    evidence,
                )
        if upgrade is not None:
            fallback[aid] = verdict  # what it is if the coupler the judgement rests on proves faulty
            verdict = upgrade
            self_judged.add(aid)
            if plan.attribute == "phase":
                mixer_checks[aid] = upgrade_effect
        actuator_out[aid] = verdict
    for aid, mixer in mixer_checks.items():
        coupler = controller.gates[mixer].coupler if mixer in controller.gates else None
        mixer_verdict = actuator_out.get(coupler or "")
        if mixer_verdict is None or mixer_verdict.verdict in FAULTY or mixer_verdict.verdict == "untested":
            # the coupler where it acts is in doubt, so the ratio the judgement rests on is not known: the
            # judgement falls back to what the other rules said
            actuator_out[aid] = fallback[aid]
            self_judged.discard(aid)
    if topology is not None and blame:
        _blame_upstream(topology, settings_of, plans, actuator_out, self_judged)
    return {
        "actuators": {
            a: v.as_dict() | ({"monitor": seen_at[a]} if a in seen_at else {}) for a, v in sorted(actuator_out.items())
        },
        "monitors": {m: v.as_dict() for m, v in monitor_out.items()},
        "design": {"kind": design.kind if design else "none", "actuators": len(optical)},
        "dark_reference": dark_source,
        "topology": topology is not None,
        "crosstalk_share": {
            "within_gate": {"bound": shares[True][0], "measured_from": shares[True][1]},
            "between_gates": {"bound": shares[False][0], "measured_from": shares[False][1]},
        },
        "monitor_looks": monitor_looks,
        "look_angles": look_angles,
        "cones": {
            c.gate: sorted(c.monitors) for m, found in cones.items() for c in found if c.gate in monitor_looks[m]
        },
    }


def _crosstalk_shares(
    plans: dict[str, ActuatorPlan],
    optical: list[str],
    near: dict[str, list[str]],
    names: list[str],
    responses: Any,
    se: Any,
    dv2: list[float],
    settings: ScanSettings,
) -> dict[bool, tuple[float, int]]:
    """The crosstalk share bound within a gate (True) and between gates (False), with how many readings measured
    it: the upper k-sigma bound of :func:`.scan_attribution.estimate_share`, never above the configured bound
    ``crosstalk_share_max``, which stands where nothing measures it (0 readings)."""
    index = {a: j for j, a in enumerate(optical)}
    pairs: dict[bool, list[tuple[int, int, int]]] = {True: [], False: []}
    for a in optical:
        own = plans[a].seen_by
        if own is None:
            continue
        for n in near.get(a, []):
            if n not in index or plans[n].seen_by is None:
                continue
            within = plans[a].gate == plans[n].gate
            exclusive = frozenset(plans[n].seen_by or ()) - own
            pairs[within] += [(index[a], index[n], k) for k, m in enumerate(names) if m in exclusive]
    out = {}
    for within, found in pairs.items():
        estimate = estimate_share(responses, se, dv2, found, settings.k_sigma) if found else None
        if estimate is None:
            out[within] = (settings.crosstalk_share_max, 0)
        else:
            out[within] = (min(estimate.upper(settings.k_sigma), settings.crosstalk_share_max), estimate.samples)
    return out


def _known_pair_light(
    topology: LatticeTopology | None,
    settings_of: dict[str, str],
    kappas: dict[str, float | None],
    scale: float | None,
    big_value: dict[str, float],
    controller: Controller,
    darkish: set[str],
) -> dict[str, float]:
    """For a coupler with two tapped outputs that both read dark, the least light (amps) a working output must
    have shown, at rest or in the coupler's look: where its inputs are unmixed (:func:`.scan_paths.unmixed`) the
    pair's total E is the power-summed estimate (scaled by what the lit monitors read), and a healthy output at
    a null with all of E on a dead partner gains E sin^2(d theta / 2) when the coupler turns by d theta (the
    coupler is a rotation of the two fields by theta / 2, kappa = sin^2(theta / 2))."""
    if topology is None or scale is None:
        return {}
    expected = incoherent_powers(topology, kappas)
    out: dict[str, float] = {}
    for gate, (column, top) in topology.gates.items():
        taps = topology.taps_at(column, top) + topology.taps_at(column, top + 1)
        if len(taps) != 2 or not set(taps) <= darkish or gate not in controller.gates:
            continue
        coupler = controller.gates[gate].coupler
        if coupler not in big_value or not unmixed(topology, settings_of, gate, "kappa"):
            continue
        total = scale * sum(expected.get(t, 0.0) for t in taps)
        turn = angle_step("kappa", big_value[coupler], kappas.get(gate))
        out[gate] = total * math.sin(turn / 2.0) ** 2
    return out


def _swing_cap(
    topology: LatticeTopology,
    kappas: dict[str, float | None],
    plan: ActuatorPlan,
    monitor: str,
    above_dark: dict[str, float],
    monitors: dict[str, Any],
    trusted: set[str],
) -> float:
    """The most a step of ``plan``'s actuator can change ``monitor`` (amps): half the light the taps it moves light
    among hold together (a reading swings between 0 and all of it), from what they read; inf where unknown."""
    spot = topology.taps.get(monitor)
    if spot is None or plan.gate is None:
        return math.inf
    taps = swing_taps(topology, kappas, plan.gate, plan.attribute, spot[0])
    if taps is None or monitor not in taps or not taps <= trusted:
        return math.inf  # a tap that may be faulty could hide light
    watts = sum(above_dark[t] / monitors[t].responsivity_a_per_w for t in taps)
    return float(0.5 * watts * monitors[monitor].responsivity_a_per_w)


def _doubtful_monitor(
    m: str,
    readings: Any,
    full_scale_a: float,
    lit_noise_a: float,
    settings: ScanSettings,
    cones: list[Cone] | None,
    looks: dict[str, dict[str, float]],
    controller: Controller,
    monitors: dict[str, Any],
    doubtful: set[str],
    uncertainty: dict[str, tuple[float, float]],
    at_dark: bool,
    pair_light: dict[str, float],
) -> Verdict:
    """A monitor at its dark level or with unchanging readings: dead or frozen only if light it should share
    with other taps moved there and not here (:func:`.verdicts.conserved_light_check`); else saturation and noise.

    Up to ``LOOK_DEPTH`` couplers before its tap are tried: a reading that followed any of them is alive."""

    def untestable(why: str) -> Verdict:
        return dark_monitor_verdict(
            dark_a=readings,
            full_scale_a=full_scale_a,
            dark_noise_a=lit_noise_a,
            false_alarm=settings.false_alarm,
            unlit_reason=f"{why}, so it could not be tested for dead or frozen",
        )

    if cones is None:
        return untestable("without the lattice topology no light can be predicted here")
    why = "no coupler before its tap could be moved"
    results: list[tuple[str, str, dict[str, float]]] = []
    for cone in cones:
        coupler = controller.gates[cone.gate].coupler if cone.gate in controller.gates else ""
        look = looks.get(coupler)
        others = sorted(cone.monitors - {m})
        if cone.reason or look is None:
            why = cone.reason or f"the coupler {coupler} before its tap could not be moved"
            continue
        if any(o in doubtful for o in others):
            why = f"the taps sharing its light ({', '.join(others)}) are in doubt too"
            least = pair_light.get(cone.gate, 0.0) * settings.loss_floor
            own_unc = sum(uncertainty[m])
            if at_dark and abs(look[m]) <= own_unc and least > 2.0 * own_unc:
                # both outputs of a coupler whose input light is known read dark, and this one did not follow
                # the coupler's move either: had it worked it would have held the light at rest or gained it then
                evidence = {"look_change_a": float(look[m]), "look_uncertainty_a": own_unc}
                results.append(("missed", coupler, evidence | {"look_least_expected_a": least}))
            continue
        watts = {o: 1.0 / monitors[o].responsivity_a_per_w for o in others}
        state, evidence = conserved_light_check(
            own_change_a=look[m],
            own_uncertainty_a=sum(uncertainty[m]),
            others_change_w=sum(look[o] * watts[o] for o in others),
            others_uncertainty_w=sum(uncertainty[o][0] * watts[o] for o in others)
            + math.sqrt(sum((uncertainty[o][1] * watts[o]) ** 2 for o in others)),
            responsivity_a_per_w=monitors[m].responsivity_a_per_w,
            loss_floor=settings.loss_floor,
        )
        results.append((state, coupler, evidence))
    if not results:
        return untestable(why)
    base = untestable("too little light moved here when the couplers before it moved")
    state, coupler, evidence = next(
        (r for wanted in ("moved", "missed") for r in results if r[0] == wanted), results[0]
    )
    evidence = base.evidence | evidence
    if state == "moved":
        return Verdict(base.verdict, "" if base.verdict == "ok" else base.reason, evidence)
    if state == "missed":
        least = evidence["look_least_expected_a"]
        if at_dark:
            return Verdict(
                "dead",
                f"it reads its dark level and did not follow a move of {coupler} that must have changed its light by "
                f"at least {least:.3g} A (what the taps sharing that light lost or gained)",
                evidence,
            )
        return Verdict(
            "frozen",
            f"its reading did not change while a move of {coupler} must have changed its light by at least "
            f"{least:.3g} A (what the taps sharing that light lost or gained)",
            evidence,
        )
    return Verdict(base.verdict, base.reason, evidence)


MIXER_KAPPA_TOLERANCE = 0.03  # how far a healthy coupler's calibrated ratio may sit from its true one: common practice


@dataclass(frozen=True)
class TappedFringe:
    """Where a coupler's fringe sits, read from the taps of both its outputs (see :func:`_tapped_fringe`)."""

    offset_w: float  # the least |D| consistent with the readings, in the upper tap's power units
    upper: str
    lower: str
    effect: str  # the gate of the coupler where the actuator acts
    gains: tuple[float, float]  # amps per unit of upper-tap power at (upper, lower), the lower one at its least
    # for a phase: (upper, lower) readings in upper-tap power units, each known to +- its uncertainty, the lower
    # tap's path ratio range, and the mixing coupler's ratio range
    readings_w: tuple[float, float] = (0.0, 0.0)
    uncertainty_w: tuple[float, float] = (0.0, 0.0)
    rho: tuple[float, float] = (1.0, 1.0)
    mixer_kappas: tuple[float, ...] = ()

    def least_sigmas(self, looks: list[tuple[float, float, float]]) -> float:
        """The least a working actuator shows (sigmas) in one of ``looks`` (turn of its fringe, what crosstalk could
        add and sigma, both in upper-tap power units): a coupler from the fringe's offset
        (:func:`.scan_attribution.offset_fringe_sigmas`); a phase over every input split its mixing coupler's
        outputs allow (:func:`.scan_attribution.mixer_phase_sigmas`), at each corner of the readings' uncertainty,
        the path ratio and the coupler's ratio."""
        if not self.mixer_kappas:
            return offset_fringe_sigmas(self.offset_w, looks)
        least = math.inf
        (p_u, p_l), (u_u, u_l) = self.readings_w, self.uncertainty_w
        for rho in (self.rho[0], 1.0, self.rho[1]):
            for du in (-u_u, 0.0, u_u):
                for dl in (-u_l, 0.0, u_l):
                    upper, lower = max(p_u + du, 0.0), max(p_l + dl, 0.0) / rho
                    shown = mixer_phase_sigmas((upper - lower) / 2.0, upper + lower, self.mixer_kappas, looks)
                    least = min(least, shown)
        return least


@dataclass(frozen=True)
class Around:
    """What the judgements from the readings around a silent actuator's coupler use: the lattice, the calibrated
    couplings, the monitors (names in frame order, config, trusted ones), the rest frames, the dark level, each
    monitor's per-frame sigma and the settings."""

    topology: LatticeTopology
    kappas: dict[str, float | None]
    names: list[str]
    monitors: dict[str, Any]
    trusted: set[str]
    rest_a: Any
    dark_a: float
    look_sigma: Any
    settings: ScanSettings
    measured: frozenset[str] = frozenset()  # actuators whose table was measured on this chip


def _tapped_fringe(around: Around, plan: ActuatorPlan, judged: list[str]) -> TappedFringe | None:
    """Where the fringe of the coupler where ``plan``'s actuator acts sits, when both of that coupler's outputs
    reach a tap with no gate between (:func:`.scan_paths.tapped_outputs`); None where they do not, or a tap is not
    fully trusted, or a ratio it needs is unknown.

    A lossless coupler's top output is S/2 + R cos(theta - alpha) (the 2x2 coupler of coupled-mode theory, Yariv
    1973, with light in both inputs), so half the taps' difference, D = (P_top - P_bottom)/2 = R cos(phi), says
    where its fringe sits now; R sin(phi) is not known. A phase turns psi, the relative phase of the mixing
    coupler's inputs, whose top output is S/2 + (A - B)/2 cos(theta) - sqrt(A B) sin(psi) sin(theta): its fringe
    in psi sits at D - (A - B)/2 cos(theta), off D by at most S |cos(theta)| / 2 = S |1 - 2 kappa| / 2 (the
    mixer's calibrated kappa, give or take ``MIXER_KAPPA_TOLERANCE``). The taps' path losses may differ by
    ``path_loss_db_max``; readings are known to k sigma of one frame's noise (drift over the scan included)."""
    topology, kappas, names, monitors, trusted = (
        around.topology,
        around.kappas,
        around.names,
        around.monitors,
        around.trusted,
    )
    rest_a, dark_a, look_sigma, settings = around.rest_a, around.dark_a, around.look_sigma, around.settings
    if plan.gate is None or plan.actuator not in around.measured:
        return None
    found = tapped_outputs(topology, kappas, plan.gate, plan.attribute)
    if found is None:
        return None
    effect, upper, lower = found
    if upper not in trusted or lower not in trusted or upper not in judged or lower not in judged:
        return None
    ku, kl = names.index(upper), names.index(lower)
    resp_u, resp_l = monitors[upper].responsivity_a_per_w, monitors[lower].responsivity_a_per_w
    # powers in the upper tap's units (its responsivity and path): the lower tap's path passes rho times as much
    p_u = max(float(rest_a[:, ku].mean()) - dark_a, 0.0) / resp_u
    p_l = max(float(rest_a[:, kl].mean()) - dark_a, 0.0) / resp_l
    rho_lo, rho_hi = 10.0 ** (-settings.path_loss_db_max / 10.0), 10.0 ** (settings.path_loss_db_max / 10.0)
    ends = [(p_u - p_l / rho_lo) / 2.0, (p_u - p_l / rho_hi) / 2.0]
    offset = 0.0 if ends[0] * ends[1] <= 0.0 else min(abs(e) for e in ends)
    k = settings.k_sigma
    offset -= (k * float(look_sigma[ku]) / resp_u + k * float(look_sigma[kl]) / (resp_l * rho_lo)) / 2.0
    if plan.attribute == "kappa":
        if kappas.get(plan.gate) is None:
            return None
        return TappedFringe(max(offset, 0.0), upper, lower, effect, (resp_u, resp_l * rho_lo))
    mixer = kappas.get(effect)
    if mixer is None:
        return None
    return TappedFringe(
        max(offset, 0.0),
        upper,
        lower,
        effect,
        (resp_u, resp_l * rho_lo),
        (p_u, p_l),
        (k * float(look_sigma[ku]) / resp_u, k * float(look_sigma[kl]) / resp_l),
        (rho_lo, rho_hi),
        tuple(min(max(mixer + d, 0.0), 1.0) for d in (-MIXER_KAPPA_TOLERANCE, 0.0, MIXER_KAPPA_TOLERANCE)),
    )


def _tapped_angles(plan: ActuatorPlan, kappas: dict[str, float | None], values: list[float]) -> list[float]:
    """Value steps of ``plan``'s actuator as turns of its fringe (rad): a phase's own; a coupler's coupled-mode
    angle, kappa = sin^2(theta / 2), exactly (not to first order: second looks are large)."""
    if plan.attribute != "kappa":
        return list(values)
    kappa0 = float(kappas.get(str(plan.gate)) or 0.0)
    return [coupling_angle(kappa0 + value) - coupling_angle(kappa0) for value in values]


def _value_for_angle(plan: ActuatorPlan, kappas: dict[str, float | None], angle: float) -> float:
    """The value step that turns ``plan``'s fringe by ``angle`` down toward 0 V (up where a coupler has no room)."""
    if plan.attribute != "kappa":
        return -angle
    kappa0 = float(kappas.get(str(plan.gate)) or 0.0)
    theta = coupling_angle(kappa0)
    target = theta - angle if theta >= angle else min(theta + angle, math.pi)
    return math.sin(target / 2.0) ** 2 - kappa0


def _tapped_sigmas(
    fringe: TappedFringe,
    plan: ActuatorPlan,
    kappas: dict[str, float | None],
    names: list[str],
    steps: list[tuple[float, Any, Any]],
) -> tuple[float, dict[str, float]]:
    """The least a working actuator must have shown (sigmas) in one of its looks (value step, sigma and what its
    neighbours' crosstalk could move, per monitor) at the taps of ``fringe``, and the evidence. Each tap is a look
    of its own (the two change by equal and opposite amounts)."""
    ku, kl = names.index(fringe.upper), names.index(fringe.lower)
    angles = _tapped_angles(plan, kappas, [value for value, _, _ in steps])
    looks = []
    for angle, (_, sigma, crosstalk) in zip(angles, steps, strict=True):
        for index, gain in ((ku, fringe.gains[0]), (kl, fringe.gains[1])):
            looks.append((angle, float(crosstalk[index]) / gain, float(sigma[index]) / gain))
    shown = fringe.least_sigmas(looks)
    return shown, {"tapped_offset_w": fringe.offset_w, "tapped_sigmas": shown, "tapped_looks": float(len(steps))}


@dataclass(frozen=True)
class LookData:
    """One suspect's looks for a judgement: value steps, and per look the change at each monitor (amps), its sigma
    per monitor and the most its neighbours' crosstalk could move each monitor."""

    values: list[float]
    changes: list[Any]
    sigmas: list[Any]
    crosstalk: list[Any]


def _around_sigmas(
    around: Around, plan: ActuatorPlan, judged: list[str], looks: LookData
) -> tuple[float, dict[str, float], str, str] | None:
    """The least a working actuator must have shown (sigmas) at the readings of its coupler's outputs, from the
    light its coupler's two inputs bring (read by taps, :func:`.scan_paths.input_readings`); None where that is not
    read, or a reading is not fully trusted, or an output reading moved (then this says nothing).

    With inputs A and B the coupler's fringe has R >= |A - B| / 2 whatever their phase (R^2 = ((A - B)/2)^2 + A B
    sin^2(psi), coupled-mode algebra, Yariv 1973); a phase turning psi at a coupler of angle theta moves its output
    by sqrt(A B) sin(theta) times a sine of psi. Each output's reading changes by what the output gains or loses
    (a lossless gate keeps the sum of its outputs, its other input unchanged), less each gate's and path's loss
    (``path_loss_db_max`` per gate) and what neighbours' crosstalk could add; the least over every operating
    angle of the clearest look is :func:`.scan_attribution.least_sigmas`."""
    topology, kappas, names, monitors, trusted = (
        around.topology,
        around.kappas,
        around.names,
        around.monitors,
        around.trusted,
    )
    rest_a, dark_a, look_sigma, settings = around.rest_a, around.dark_a, around.look_sigma, around.settings
    if plan.gate is None or plan.actuator not in around.measured:
        return None
    found = input_readings(topology, kappas, plan.gate, plan.attribute)
    if found is None:
        return None
    outputs = [reading.taps for reading in found.outputs]
    every = list(found.inputs) + [t for taps in outputs for t in taps]
    if any(t not in trusted for t in every) or any(t not in judged for taps in outputs for t in taps):
        return None
    k = settings.k_sigma
    loss = 10.0 ** (-settings.path_loss_db_max / 10.0)
    lows = []
    for tap in found.inputs:
        i = names.index(tap)
        resp = monitors[tap].responsivity_a_per_w
        reading = (float(rest_a[:, i].mean()) - dark_a) / resp
        lows.append(
            (max(reading - k * float(look_sigma[i]) / resp, 0.0) * loss, reading + k * float(look_sigma[i]) / resp)
        )
    (a_lo, a_hi), (b_lo, b_hi) = lows
    if plan.attribute == "kappa":
        if kappas.get(plan.gate) is None:
            return None
        amplitude = max(a_lo - b_hi, b_lo - a_hi, 0.0) / 2.0
    else:
        mixer = kappas.get(found.effect)
        if mixer is None:
            return None
        worst = min(max(abs(mixer - 0.5) + MIXER_KAPPA_TOLERANCE, 0.0), 0.5) + 0.5
        amplitude = math.sqrt(a_lo * b_lo) * 2.0 * math.sqrt(worst * (1.0 - worst))
    angles = _tapped_angles(plan, kappas, looks.values)
    entries = []
    for reading, taps in zip(found.outputs, outputs, strict=True):
        scale = amplitude * 10.0 ** (-(1 + reading.gates_passed) * settings.path_loss_db_max / 10.0)
        index = [names.index(t) for t in taps]
        resp = [monitors[t].responsivity_a_per_w for t in taps]
        for angle, change, sigma, crosstalk in zip(angles, looks.changes, looks.sigmas, looks.crosstalk, strict=True):
            seen = sum(float(change[i]) / r for i, r in zip(index, resp, strict=True))
            noise = sum(float(sigma[i]) / r for i, r in zip(index, resp, strict=True))
            other = sum(float(crosstalk[i]) / r for i, r in zip(index, resp, strict=True))
            if abs(seen) >= k * noise:
                return None  # it moved this reading: not silent here
            entries.append((angle, other / scale if scale > 0 else math.inf, noise / scale if scale > 0 else 1.0))
    shown = 0.0 if amplitude <= 0.0 or not entries else least_sigmas(1.0, entries)
    taps_text = ", ".join(every)
    return shown, {"input_amplitude_w": amplitude, "input_bound_sigmas": shown}, taps_text, found.effect


LOOK_MARGIN = 1.6  # a planned second look aims this far past what a no_response needs (its steps land on DAC codes)


def _planned_look_angle(fringe: TappedFringe, names: list[str], look_sigma: Any, needed: float) -> float:
    """The smallest turn (rad, from 0.3 to 1.5) whose second look - a half and a full step the same way - makes a
    working actuator show ``needed`` sigma at ``fringe``'s taps; the largest where none does."""
    ku, kl = names.index(fringe.upper), names.index(fringe.lower)
    sigma = LOOK_SPREAD / max(fringe.gains[0] / float(look_sigma[ku]), fringe.gains[1] / float(look_sigma[kl]))
    for angle in np.arange(0.3, 1.5001, 0.05):
        if fringe.least_sigmas([(angle / 2.0, 0.0, sigma), (angle, 0.0, sigma)]) >= needed:
            return float(angle)
    return 1.5


DETECTABLE = 2.0  # a no_response needs a working actuator to show at least this many detection limits, anywhere
WEAK_LIGHT = 100.0  # expected light below this many dead-thresholds: too little to judge an actuator by


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
    expected = incoherent_powers(topology, calibrated_kappas(controller))
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


def _residual_sigma(design: PerturbationDesign | None, levels: Any) -> float:
    """The rms residual of one monitor's design frames about the fit (0 where too few spare frames): drift and noise
    on the time scale of frames with moves between them."""
    if design is None or design.spare < 4 or len(levels) != design.frames:
        return 0.0
    x = design.regressors()
    coef, *_ = np.linalg.lstsq(x, levels, rcond=None)
    return float(np.sqrt(np.sum((levels - x @ coef) ** 2) / design.spare))


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
    dof = design.spare if design is not None else 0
    if design is not None and dof >= 4:
        x = design.regressors()
        coef, *_ = np.linalg.lstsq(x, frame_a, rcond=None)
        sigma = np.maximum(sigma, np.sqrt(np.sum((frame_a - x @ coef) ** 2, axis=0) / dof))
    return sigma


def _dark(samples: Any, full_scale_a: float, noise_a: float, settings: ScanSettings) -> Verdict:
    return dark_monitor_verdict(
        dark_a=samples, full_scale_a=full_scale_a, dark_noise_a=noise_a, false_alarm=settings.false_alarm
    )


def _blame_upstream(
    topology: LatticeTopology,
    settings_of: dict[str, str],
    plans: dict[str, ActuatorPlan],
    verdicts: dict[str, Verdict],
    self_judged: set[str],
) -> None:
    """An actuator without response whose light passes a faulty one first cannot be judged: its light was changed.
    Those in ``self_judged`` are exempt: what their judgement rests on was read where they act, faults or not."""
    faulty = [a for a, v in verdicts.items() if v.verdict in FAULTY and a in plans]
    for aid, verdict in list(verdicts.items()):
        plan = plans.get(aid)
        if plan is None or plan.gate is None or verdict.verdict != "no_response" or aid in self_judged:
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
