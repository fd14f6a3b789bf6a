"""Which monitors can see which actuator at an operating point: the scan's observability rules.

Light is followed as a set of lit modes through the lattice (:class:`.lattice.LatticeTopology`),
each gate set to bar, cross or split by its coupler's calibrated ratio. The first-order rules a
scan relies on (standard directional-coupler and Mach-Zehnder algebra):

* a coupler changes the power split of its two outputs, so it is seen by any monitor its outputs
  reach, provided light enters it;
* a phase shifter changes only the phase of its arm, so its effect appears in power only where
  that arm's light meets *other* coherent light in a later coupler that splits; it is seen by the
  monitors that coupler's outputs reach. A phase after the last splitting coupler on its path is
  invisible to every power monitor.

Anything else is reported with the reason it cannot be seen; the scan then calls the actuator
``unobservable`` rather than ``ok``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

from meshwarden.procedures.inputs import ProcedureInputError
from meshwarden.procedures.lattice import LatticeTopology

BAR_CROSS_TOLERANCE = 0.02  # kappa within this of 0 (or 1) counts as bar (or cross): common practice


def gate_setting(kappa: float | None, tolerance: float = BAR_CROSS_TOLERANCE) -> str:
    """ "bar", "cross" or "split" for a coupler's power coupling (None: unknown, taken as split)."""
    if kappa is None:
        return "split"
    if kappa <= tolerance:
        return "bar"
    if kappa >= 1.0 - tolerance:
        return "cross"
    return "split"


@dataclass(frozen=True)
class Sight:
    """The monitors that can see one actuator, or why none can."""

    monitors: frozenset[str]
    reason: str = ""


def _apply(topology: LatticeTopology, column: int, lit: set[int], settings: Mapping[str, str]) -> set[int]:
    out = set(lit)
    for gate, (col, top) in topology.gates.items():
        if col != column:
            continue
        a, b = top in lit, top + 1 in lit
        setting = settings.get(gate, "split")
        out.discard(top)
        out.discard(top + 1)
        if setting == "cross":
            a, b = b, a
        elif setting == "split":
            a = b = a or b
        if a:
            out.add(top)
        if b:
            out.add(top + 1)
    return out


def lit_modes(topology: LatticeTopology, settings: Mapping[str, str]) -> dict[int, set[int]]:
    """Lit modes after each column (-1: at the input)."""
    lit = {-1: set(topology.input_modes)}
    for column in range(topology.columns):
        lit[column] = _apply(topology, column, lit[column - 1], settings)
    return lit


def lit_monitors(topology: LatticeTopology, settings: Mapping[str, str]) -> set[str]:
    """Monitors whose tapped mode carries light at this operating point."""
    lit = lit_modes(topology, settings)
    return {m for m, (after, mode) in topology.taps.items() if mode in lit[after]}


def reached_monitors(
    topology: LatticeTopology, settings: Mapping[str, str], after_column: int, modes: set[int]
) -> set[str]:
    """Monitors that light on ``modes`` after ``after_column`` reaches (taps from that column on)."""
    reached: set[str] = set()
    current = set(modes)
    for column in range(after_column, topology.columns):
        if column > after_column:
            current = _apply(topology, column, current, settings)
        reached |= {m for m, (after, mode) in topology.taps.items() if after == column and mode in current}
    return reached


def sight(topology: LatticeTopology, settings: Mapping[str, str], gate: str, attribute: str) -> Sight:
    """Who can see the ``attribute`` ("kappa" or "phase") of ``gate`` at these gate settings."""
    if gate not in topology.gates:
        return Sight(frozenset(), f"gate {gate} is not in the lattice topology")
    if attribute not in ("kappa", "phase"):
        raise ProcedureInputError(f"attribute must be 'kappa' or 'phase', got {attribute!r}")
    column, top = topology.gates[gate]
    lit = lit_modes(topology, settings)
    if not {top, top + 1} & lit[column - 1]:
        return Sight(frozenset(), f"no light reaches gate {gate} at this operating point")
    if attribute == "kappa":
        seen = reached_monitors(topology, settings, column, {top, top + 1})
        if not seen:
            return Sight(frozenset(), f"no monitor is downstream of gate {gate}")
        return Sight(frozenset(seen))
    if top not in lit[column]:
        return Sight(frozenset(), f"no light leaves gate {gate} on its phase-shifted arm")
    phased = {top}
    for later in range(column + 1, topology.columns):
        mixed: set[str] = set()
        for other, (col, other_top) in topology.gates.items():
            if col != later or not {other_top, other_top + 1} & phased:
                continue
            pair = {other_top, other_top + 1}
            unmixed = pair - phased
            if settings.get(other, "split") == "split" and unmixed & lit[later - 1]:
                mixed |= reached_monitors(topology, settings, later, pair)
        if mixed:
            return Sight(frozenset(mixed))
        phased = _apply(topology, later, phased, settings)
    return Sight(
        frozenset(),
        f"the phase of {gate} meets no other light in a splitting coupler before a monitor (first-order invisible)",
    )


def upstream_of(
    topology: LatticeTopology,
    settings: Mapping[str, str],
    gate: str,
    attribute: str,
    later_gate: str,
    later_attribute: str,
) -> bool:
    """Whether light passing ``gate``'s ``attribute`` goes on to ``later_gate``'s ``later_attribute``.

    Within one gate the coupler comes before the phase shifter.
    """
    if gate not in topology.gates or later_gate not in topology.gates:
        return False
    if gate == later_gate:
        return attribute == "kappa" and later_attribute == "phase"
    column, top = topology.gates[gate]
    later_column, later_top = topology.gates[later_gate]
    if later_column <= column:
        return False
    modes = {top, top + 1}
    for between in range(column + 1, later_column):
        modes = _apply(topology, between, modes, settings)
    return bool(modes & {later_top, later_top + 1})


def incoherent_powers(topology: LatticeTopology, kappas: Mapping[str, float | None]) -> dict[str, float]:
    """Power at each tap, relative to one unit in each input mode, if light added in power, not in field.

    A gate sends 1 - kappa of each input straight on and kappa across (unknown kappa: 1/2); losses and the
    tap fraction are left out (a common factor). Interference moves real powers around this estimate
    (to zero at a null), so it only says roughly how much light a tap can expect.
    """
    power = [0.0] * topology.modes
    for mode in topology.input_modes:
        power[mode] = 1.0
    out = {m: power[mode] for m, (after, mode) in topology.taps.items() if after == -1}
    for column in range(topology.columns):
        _mix_column(topology, kappas, column, power)
        out |= {m: power[mode] for m, (after, mode) in topology.taps.items() if after == column}
    return out


def _mix_column(topology: LatticeTopology, kappas: Mapping[str, float | None], column: int, power: list[float]) -> None:
    """Power-summed light through one column, in place: each gate sends 1 - kappa of each input
    straight on and kappa across (unknown kappa: 1/2)."""
    for gate, (col, top) in topology.gates.items():
        if col != column:
            continue
        kappa = kappas.get(gate)
        k = 0.5 if kappa is None else min(max(kappa, 0.0), 1.0)
        upper, lower = power[top], power[top + 1]
        power[top], power[top + 1] = (1 - k) * upper + k * lower, k * upper + (1 - k) * lower


def _powers(
    topology: LatticeTopology, kappas: Mapping[str, float | None], start: dict[int, float], first: int
) -> dict[int, list[float]]:
    """Power-summed light per mode after each column from ``first`` on, given the power after ``first - 1``."""
    power = [start.get(m, 0.0) for m in range(topology.modes)]
    out = {first - 1: list(power)}
    for column in range(first, topology.columns):
        _mix_column(topology, kappas, column, power)
        out[column] = list(power)
    return out


def _transfer(topology: LatticeTopology, kappas: Mapping[str, float | None], after: int, mode: int) -> dict[str, float]:
    """Fraction of unit power on ``mode`` after column ``after`` that reaches each tap from there on (power-summed)."""
    powers = _powers(topology, kappas, {mode: 1.0}, after + 1)
    return {m: powers[a][k] for m, (a, k) in topology.taps.items() if a >= after}


def expected_effect(
    topology: LatticeTopology, kappas: Mapping[str, float | None], gate: str, attribute: str
) -> dict[str, float]:
    """A generous estimate of |d(tap power)/d(value)| at each tap, per unit of input power in each input mode.

    From the coupler and Mach-Zehnder algebra with powers summed (phases unknown): a coupler with inputs P_a,
    P_b moves at most |P_b - P_a| + |1 - 2 kappa| sqrt(P_a P_b / (kappa (1 - kappa))) per unit kappa; a phase
    whose arm P_a meets P_b in a coupler of ratio kappa moves at most 2 sqrt(kappa (1 - kappa) P_a P_b) per
    radian; each then reaches a tap by the larger of the two outputs' power-summed transfer. Where this is below
    what a scan can detect, a missing response says nothing about the actuator.
    """
    if gate not in topology.gates:
        return {}
    column, top = topology.gates[gate]
    base = _powers(topology, kappas, {m: 1.0 for m in topology.input_modes}, 0)
    if attribute == "kappa":
        pa, pb = base[column - 1][top], base[column - 1][top + 1]
        k = min(max(kappas.get(gate) or 0.5, 0.01), 0.99)
        slope = abs(pb - pa) + abs(1 - 2 * k) * math.sqrt(pa * pb / (k * (1 - k)))
        mixer_column, mixer_top = column, top
    else:
        found = _mixer(topology, kappas, column, top)
        if found is None:
            return {}
        mixer_column, mixer_top, phased = found
        pa = sum(base[mixer_column - 1][m] for m in phased & {mixer_top, mixer_top + 1})
        pb = sum(base[mixer_column - 1][m] for m in {mixer_top, mixer_top + 1} - phased)
        mixer = topology.gate_at(mixer_column, mixer_top)
        k = min(max(kappas.get(mixer or "") or 0.5, 0.0), 1.0)
        slope = 2 * math.sqrt(k * (1 - k) * pa * pb)
    upper = _transfer(topology, kappas, mixer_column, mixer_top)
    lower = _transfer(topology, kappas, mixer_column, mixer_top + 1)
    return {m: slope * max(upper.get(m, 0.0), lower.get(m, 0.0)) for m in upper}


def _mixer(
    topology: LatticeTopology, kappas: Mapping[str, float | None], column: int, top: int
) -> tuple[int, int, set[int]] | None:
    """The first later coupler where the phase-shifted arm (mode ``top`` after ``column``) meets other light."""
    settings = {g: gate_setting(k) for g, k in kappas.items()}
    lit = lit_modes(topology, settings)
    phased = {top}
    for later in range(column + 1, topology.columns):
        for other, (col, other_top) in topology.gates.items():
            pair = {other_top, other_top + 1}
            if (
                col == later
                and pair & phased
                and settings.get(other, "split") == "split"
                and (pair - phased) & lit[later - 1]
            ):
                return later, other_top, set(phased)
        phased = _apply(topology, later, phased, settings)
    return None


def neighbours(topology: LatticeTopology, gate: str, attribute: str) -> list[tuple[str, str]]:
    """The electrodes beside ``gate``'s ``attribute`` ("kappa" or "phase"): the other actuator of its gate, and the
    like actuator of each gate next to it in its lattice column (top mode two apart).

    Electrostatic force grows as V^2 whatever the polarity (Senturia, *Microsystem Design*, 2001, ch. 6), so a
    neighbour's fringing field moves an actuator as if a share of the neighbour's V^2 were added to its own drive;
    these are the electrodes close enough for that share to matter (the layout of a lattice: common practice).
    """
    if gate not in topology.gates:
        return []
    column, top = topology.gates[gate]
    out = [(gate, "phase" if attribute == "kappa" else "kappa")]
    for other, (col, other_top) in sorted(topology.gates.items()):
        if col == column and abs(other_top - top) == 2:
            out.append((other, attribute))
    return out


@dataclass(frozen=True)
class Cone:
    """The taps that share one coupler's output light: what the coupler takes from one it gives to the others."""

    gate: str
    monitors: frozenset[str]
    reason: str = ""


def conservation_cone(topology: LatticeTopology, monitor: str, depth: int = 0) -> Cone:
    """A coupler before ``monitor``'s tap (the last one on its mode, or ``depth`` more back along that mode) and
    every tap its output light reaches in the tap's column.

    A lossless coupler is unitary (its 2x2 matrix, standard), so moving it moves power between its outputs without
    changing their sum; light it sends on through later gates up to the tap's column keeps that sum (each later
    gate is unitary too, and its other input does not change). When every mode that light can reach is tapped in
    that column, the taps' changes add up to zero: what ``monitor`` should gain or lose is minus what the others
    read. Returns the cone with an empty ``gate`` and a reason when no such coupler or complete set of taps exists.
    """
    if monitor not in topology.taps:
        return Cone("", frozenset(), f"monitor {monitor} is not in the lattice topology")
    after, mode = topology.taps[monitor]
    passed = [g for c in range(after, -1, -1) if (g := topology.gate_at(c, mode)) is not None]
    if len(passed) <= depth:
        return Cone("", frozenset(), f"no coupler comes before the tap of {monitor}")
    found = passed[depth]
    column, top = topology.gates[found]
    modes = {top, top + 1}
    split = {g: "split" for g in topology.gates}  # every mode its light could reach, whatever the settings
    for later in range(column + 1, after + 1):
        modes = _apply(topology, later, modes, split)
    taps = {m for m, (a, k) in topology.taps.items() if a == after and k in modes}
    untapped = sorted(k for k in modes if not any(topology.taps_at(after, k)))
    if untapped:
        return Cone(found, frozenset(taps), f"the light of gate {found} also reaches untapped modes {untapped}")
    return Cone(found, frozenset(taps))


def swing_taps(
    topology: LatticeTopology, kappas: Mapping[str, float | None], gate: str, attribute: str, after: int
) -> frozenset[str] | None:
    """The taps after column ``after`` among which ``gate``'s ``attribute`` can move light, or None if that light
    also reaches untapped modes there.

    The actuator moves light only between the outputs of the coupler where its effect first shows (its own coupler;
    for a phase, the coupler where its arm meets other light), and on from there through unitary gates: so the
    power it moves at those taps is at most what they hold together (conservation of power, as in
    :func:`conservation_cone`).
    """
    if gate not in topology.gates:
        return None
    column, top = topology.gates[gate]
    if attribute != "kappa":
        found = _mixer(topology, kappas, column, top)
        if found is None:
            return None
        column, top = found[0], found[1]
    if after < column:
        return None
    modes = {top, top + 1}
    split = {g: "split" for g in topology.gates}
    for later in range(column + 1, after + 1):
        modes = _apply(topology, later, modes, split)
    if any(not topology.taps_at(after, k) for k in modes):
        return None
    return frozenset(m for m, (a, k) in topology.taps.items() if a == after and k in modes)


def unmixed(topology: LatticeTopology, settings: Mapping[str, str], gate: str, attribute: str) -> bool:
    """Whether the light entering the coupler where ``gate``'s ``attribute`` shows (its own coupler; for a phase,
    the coupler where its arm meets other light) has met no other light on its way: every gate it passed had one
    lit input.

    Only then is the light on each input what the power-summed estimate says (a gate with one lit input splits
    power by its ratio, whatever the phases): after light from two inputs has interfered, how much reaches each
    arm depends on phases the daemon does not know, and a working actuator's fringe can be anywhere from nothing
    up (two-beam interference, standard).
    """
    if gate not in topology.gates:
        return False
    column, top = topology.gates[gate]
    if attribute != "kappa":
        kappas = {g: 0.5 if s == "split" else 0.0 if s == "bar" else 1.0 for g, s in settings.items()}
        found = _mixer(topology, kappas, column, top)
        if found is None:
            return False
        column, top = found[0], found[1]
    lit = {mode: mode in topology.input_modes for mode in range(topology.modes)}
    mixed = {mode: False for mode in range(topology.modes)}
    for col in range(column):
        for other, (c, t) in topology.gates.items():
            if c != col:
                continue
            both = lit[t] and lit[t + 1]
            flag = both or mixed[t] or mixed[t + 1]
            setting = settings.get(other, "split")
            if setting == "split":
                lit[t] = lit[t + 1] = lit[t] or lit[t + 1]
                mixed[t] = mixed[t + 1] = flag
            elif setting == "cross":
                lit[t], lit[t + 1] = lit[t + 1], lit[t]
                mixed[t], mixed[t + 1] = mixed[t + 1], mixed[t]
    return not (mixed[top] or mixed[top + 1])


def clean_tap(topology: LatticeTopology, after: int, mode: int) -> str | None:
    """The first tap on ``mode`` from column ``after`` on that light reaches with no gate touching the mode on the way
    (a tap after column ``after`` itself, or after a later column where no gate acts on that mode before it): it
    reads the power that mode carries after column ``after``, less path losses, whatever the rest of the lattice
    does. None where a gate comes first."""
    for column in range(after, topology.columns):
        if column > after and topology.gate_at(column, mode) is not None:
            return None
        taps = topology.taps_at(column, mode)
        if taps:
            return taps[0]
    return None


def effect_coupler(topology: LatticeTopology, gate: str, attribute: str) -> tuple[str, int, int] | None:
    """(gate, column, top mode) of the coupler where ``gate``'s ``attribute`` shows: its own coupler; for a phase,
    the first later coupler where its arm meets light from another input, every coupler taken as splitting
    whatever its calibrated ratio (one near bar or cross still leaks some light across), so no earlier coupler
    can mix its light with other light. None where there is none."""
    if gate not in topology.gates:
        return None
    column, top = topology.gates[gate]
    if attribute == "kappa":
        return gate, column, top
    found = _mixer(topology, {g: 0.5 for g in topology.gates}, column, top)
    if found is None:
        return None
    effect = topology.gate_at(found[0], found[1])
    return None if effect is None else (effect, found[0], found[1])


def tapped_outputs(
    topology: LatticeTopology, kappas: Mapping[str, float | None], gate: str, attribute: str
) -> tuple[str, str, str] | None:
    """(gate, top tap, bottom tap) of the coupler where ``gate``'s ``attribute`` shows (its own coupler; for a
    phase, the first later coupler where its arm meets light from another input) when both of that coupler's
    outputs reach a tap with no gate between (:func:`clean_tap`); else None. The coupler is found by
    :func:`effect_coupler`; its input from the phase's side then carries only light the phase shifted."""
    spot = effect_coupler(topology, gate, attribute)
    if spot is None:
        return None
    effect, column, top = spot
    upper, lower = clean_tap(topology, column, top), clean_tap(topology, column, top + 1)
    if upper is None or lower is None:
        return None
    return effect, upper, lower


def input_tap(topology: LatticeTopology, column: int, mode: int) -> str | None:
    """The tap that reads the light ``mode`` brings into column ``column``: the last tap on that mode before the
    column with no gate touching the mode between (it reads that light, less path losses). None where a gate comes
    between, or no tap reads it."""
    for after in range(column - 1, -2, -1):
        taps = topology.taps_at(after, mode)
        if taps:
            return taps[0]
        if after >= 0 and topology.gate_at(after, mode) is not None:
            return None
    return None


@dataclass(frozen=True)
class OutputReading:
    """How one output of a coupler is read: the taps whose readings add up to its power plus light that does not
    change with the coupler (one tap with no gate between; or both taps of the next gate it enters, whose other
    input comes from elsewhere, a lossless gate keeping the sum of its outputs), and the gates passed on the way."""

    taps: tuple[str, ...]
    gates_passed: int


def output_reading(topology: LatticeTopology, column: int, mode: int) -> OutputReading | None:
    """How the power on ``mode`` after column ``column`` is read (:class:`OutputReading`), or None."""
    direct = clean_tap(topology, column, mode)
    if direct is not None:
        return OutputReading((direct,), 0)
    for later in range(column + 1, topology.columns):
        gate = topology.gate_at(later, mode)
        if gate is None:
            continue
        top = topology.gates[gate][1]
        upper, lower = clean_tap(topology, later, top), clean_tap(topology, later, top + 1)
        if upper is None or lower is None:
            return None
        return OutputReading((upper, lower), 1)
    return None


@dataclass(frozen=True)
class InputReadings:
    """Where an actuator acts, read around its coupler: the taps reading the light of its two inputs (upper,
    lower) and the readings of its two outputs."""

    effect: str
    inputs: tuple[str, str]
    outputs: tuple[OutputReading, OutputReading]


def input_readings(
    topology: LatticeTopology, kappas: Mapping[str, float | None], gate: str, attribute: str
) -> InputReadings | None:
    """The coupler where ``gate``'s ``attribute`` shows (as :func:`tapped_outputs`), when taps read the light of both
    its inputs (:func:`input_tap`) and both its outputs are read (:func:`output_reading`); else None. For a phase
    the taps read whatever enters it, however the light got there."""
    spot = effect_coupler(topology, gate, attribute)
    if spot is None:
        return None
    effect, column, top = spot
    upper_in, lower_in = input_tap(topology, column, top), input_tap(topology, column, top + 1)
    upper_out, lower_out = output_reading(topology, column, top), output_reading(topology, column, top + 1)
    if upper_in is None or lower_in is None or upper_out is None or lower_out is None:
        return None
    if set(upper_out.taps) & set(lower_out.taps):  # both outputs enter one gate: its sum would not change
        return None
    return InputReadings(effect, (upper_in, lower_in), (upper_out, lower_out))
