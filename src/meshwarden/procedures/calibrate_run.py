"""The calibration runner: measure every actuator in place through the chip's own monitors.

It holds one motion claim on the whole chip for its length and moves only through it, so every
sweep point passes the guard and no other client moves an actuator meanwhile. The order comes
from the lattice topology (:mod:`meshwarden.procedures.order`): gates are calibrated one part at a
time, each using gates already calibrated (in this run, or by the active tables) to route light
to it and monitor taps downstream to observe it.

* A coupler: its bar and cross light reach separate taps; a sweep of ``points`` voltages (even in
  the active table's coupling ratio up to its top, then in small steps above it until the coupling
  has turned over past full transfer, never above the hard limit) gives kappa = P_cross / (P_bar +
  P_cross) per point; the fit in angle space (:func:`fit_coupler_angle_table`) finds full transfer
  between the points on either side of it, which is then measured too; the table is gated.
* A phase shifter: its gate and the combiner downstream set to 1/2 make an interferometer; a sweep
  (even in the active table's phase) gives the fringe ``A + B cos(phi0 + c w(V^2))``, fitted, turned
  into a table of the phase the mesh sees, gated. The fringe's reference (what the rest of the
  interferometer adds) comes from the ideal lattice with every other phase at its logical value;
  a phase shifter never calibrated counts as 0 at 0 V. Phases are observable only as differences
  around interferometers: this fixes the one reference per chain that no power measurement can.

Between steps, every actuator not named by the step is held at 0 V; readings wait one dwell after
the last move (the configured dwell covers the actuators' ringdown). The procedure refuses to
start with the laser dark, and puts every output back where it found it at the end. Frames (monitor
reads) are counted per actuator.
"""

from __future__ import annotations

import asyncio
import math
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from meshwarden.calibration import CalibrationTable
from meshwarden.claims import Claim
from meshwarden.crosstalk import CrosstalkShares, share_from_shift
from meshwarden.errors import (
    LimitRefused,
    MeshwardenError,
    OutOfRangeRefused,
    RefusedError,
    StoppedRefused,
    UnknownTargetRefused,
)
from meshwarden.mapping import ActuatorMap
from meshwarden.procedures.coupler_fit import (
    FOLD_ANGLE_RAD,
    MAX_RESIDUAL_KAPPA,
    CouplerTableFit,
    balance_weights,
    combined_share,
    coupler_gate,
    fit_coupler_angle_table,
    mixed_share_from_swing,
    widest_gap_volts,
)
from meshwarden.procedures.fringe import fit_fringe, four_step_phase
from meshwarden.procedures.interferometer import fringe_reference
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.order import CalibrationStep, calibration_order
from meshwarden.procedures.phase_table import MAX_RESIDUAL_FRACTION, build_phase_table

Progress = Callable[[int, int, str], None]
DEFAULT_POINTS = 12
MIN_POINTS, MAX_POINTS = 12, 64
LIT_FRACTION_OF_ADC = 0.01  # the laser counts as on when a monitor reads above 1 % of its ADC range
SPLIT = 0.5
COUPLER_EXTEND_FRACTION = 0.025  # a coupler's sweep goes on above its table in steps of 2.5 % of its top volts
CROSSTALK_TOP_MARGIN = 0.05  # a crosstalk reading this close to a table's top may have folded past it
CROSSTALK_AGREE = 0.0005  # besides 10 %: how far the half-drive and full-drive shares may differ
COUPLER_TURN_DROP = 0.1  # ... until its plain ratio has fallen this far below its largest value
COUPLER_GAP_FILLS = 2  # at most this many points more where the sweep left a wide step in kappa
MAX_KAPPA_GAP = 0.15  # ... wider than this (an even sweep of 12 points steps by 0.125)
COUPLER_REFINE_ROUNDS = 3  # full transfer is measured (and the fit made again) at most this often
PHASE_LOW_FRACTIONS = (0.5, 0.75)  # of a phase sweep's first step: two more points inside it
PHASE_SWEEP_TURNS = 1.5  # a phase sweep covers this many turns of the table in force (>= 1 needed)


@dataclass
class Outcome:
    """What calibration made of one actuator."""

    status: str  # ok | unobservable | failed
    reason: str = ""
    residual: float = math.nan
    points: int = 0
    frames: int = 0
    table: CalibrationTable | None = None
    sweep: dict[str, Any] | None = None  # the measured points and the fit (see :func:`sweep_record`)

    def as_dict(self) -> dict[str, Any]:
        return {
            "status": self.status,
            "residual": None if math.isnan(self.residual) else self.residual,
            "points": self.points,
            "frames": self.frames,
            "reason": self.reason,
        }


@dataclass
class CalibrationRun:
    version: str
    outcomes: dict[str, Outcome] = field(default_factory=dict)
    frames: int = 0
    seconds: float = 0.0
    crosstalk: dict[str, dict[str, float]] = field(default_factory=dict)  # on -> {by: share}

    def tables(self) -> dict[str, CalibrationTable]:
        return {a: o.table for a, o in self.outcomes.items() if o.status == "ok" and o.table is not None}

    def sweeps(self) -> dict[str, dict[str, Any]]:
        """The measured points of every actuator that was swept (kept with the version for plots)."""
        return {a: o.sweep for a, o in sorted(self.outcomes.items()) if o.sweep is not None}


def _rounded(values: Any) -> list[float | None]:
    """Nine significant digits: a residual (a difference of two close numbers) keeps about six
    even when the fit is a thousand times better than the data's size; half the bytes of a full
    float. None for a missing or non-finite value (JSON has no NaN)."""
    return [float(f"{float(v):.9g}") if v is not None and math.isfinite(v) else None for v in values]


def _table_for_plot(fit: CouplerTableFit, every: int = 3) -> dict[str, list[float | None]]:
    """A coupler's table for its stored sweep (drawn in plots, never mapped through): every
    ``every``-th point and the last, so the record stays about as small as with four points per
    measured interval while the table itself keeps twelve."""
    keep = sorted({*range(0, len(fit.volts), every), len(fit.volts) - 1})
    return {"volts": _rounded([fit.volts[i] for i in keep]), "kappa": _rounded([fit.kappa[i] for i in keep])}


def sweep_record(
    quantity: str,
    volts: list[float],
    measured: list[float],
    fitted: list[float] | None = None,
    model: dict[str, Any] | None = None,
    residual_of_limit: float | None = None,
) -> dict[str, Any]:
    """One actuator's sweep as stored beside its version: the volts, the measured ``quantity``
    (``kappa`` for a coupler; ``power_w``, the fringe taps' power, for a phase shifter), the fit's
    value at each point (None where the fit did not use the point, or no fit was made), the fit
    itself (a coupler's table ``{"volts", "kappa"}``, a fringe's parameters) and the residual as a
    fraction of the limit its gate allows (1.0: at the limit)."""
    padded = list(fitted or []) + [None] * (len(volts) - len(fitted or []))
    return {
        "quantity": quantity,
        "volts": _rounded(volts),
        "measured": _rounded(measured),
        "fitted": _rounded(padded),
        "model": model,
        "residual_of_limit": None if residual_of_limit is None else float(f"{residual_of_limit:.4g}"),
    }


def topology_of(controller: Any) -> LatticeTopology:
    lattice = controller.config.chip.lattice
    if lattice is None:
        raise RefusedError(
            "calibration needs the chip's layout: add a chip.lattice section to the configuration "
            "(docs/configuration.md)"
        )
    columns = [dict(column) for column in lattice.columns]
    taps = {m: (after, mode) for m, after, mode in lattice.taps}
    return LatticeTopology.from_lattice(lattice.modes, columns, taps, lattice.input_modes)


def expand_targets(controller: Any, targets: list[str] | None) -> set[str]:
    """Actuator ids from actuator or gate ids (all actuators when none)."""
    if not targets:
        return set(controller.actuators)
    out: set[str] = set()
    for target in targets:
        if target in controller.actuators:
            out.add(target)
        elif target in controller.gates:
            out |= {controller.gates[target].coupler, controller.gates[target].phase}
        else:
            raise UnknownTargetRefused(f"unknown target '{target}' (an actuator or gate id)", target=target)
    return out


def _point_on_top(fit: CouplerTableFit, points: dict[float, tuple[float, float]]) -> bool:
    """Whether a measured point lies within FOLD_ANGLE_RAD of full transfer (slope of the angle
    from the table's last interval), so that the top's kappa is read, not guessed."""
    full = fit.full_transfer_volts
    if full is None or len(fit.volts) < 2:
        return False
    below = math.asin(math.sqrt(min(max(fit.kappa[-2], 0.0), 1.0)))
    slope = (math.pi / 2 - below) / max(full - fit.volts[-2], 1e-12)
    return any(abs(v - full) * slope < FOLD_ANGLE_RAD for v in points)


class Calibrator:
    """One calibration run over a held claim (see the module docstring)."""

    def __init__(self, controller: Any, claim: Claim, version: str, points: int, progress: Progress | None) -> None:
        self.ctl = controller
        self.claim = claim
        self.points = points
        self.progress = progress
        self.run = CalibrationRun(version)
        self.new: dict[str, CalibrationTable] = {}
        self.maps: dict[str, ActuatorMap] = {}
        self.topology = topology_of(controller)
        self.gate_of = {g.coupler: gid for gid, g in controller.gates.items()}
        self.gate_of.update({g.phase: gid for gid, g in controller.gates.items()})
        self.held: dict[str, float] = {}
        self.stand_ins: set[tuple[str, str]] = set()  # (coupler, phase) shares taken from other gates
        # couplers fitted with a stand-in own-phase share: (points, V_half^2 / states, step)
        self.refit: dict[str, tuple[dict[float, tuple[float, float]], float, CalibrationStep]] = {}
        # couplers read at half turns of uncalibrated phase shifters: (step, those shifters, volts)
        self.revisit: dict[str, tuple[CalibrationStep, tuple[str, ...], tuple[float, ...]]] = {}

    # ---------------------------------------------------------------- tables in force for this run

    def _take(self, actuator: str, table: CalibrationTable) -> None:
        """Use a table this run measured (and its map, built once) for the rest of the run."""
        act = self.ctl.actuators[actuator]
        self.new[actuator] = table
        self.maps[actuator] = ActuatorMap(actuator, act.config.kind, table, act.limit.hard_limit_volts)

    def _map(self, actuator: str) -> ActuatorMap:
        """This run's map of an actuator if it measured one, else the one in force."""
        return self.maps.get(actuator) or self.ctl.actuators[actuator].map

    def _volts_for(self, actuator: str, value: float) -> float:
        return float(self._map(actuator).volts_for(value))

    def _value_at(self, actuator: str, volts: float) -> float:
        """The logical value at ``volts``: this run's table, the active one if measured, else 0 at 0 V
        (the gauge of a phase shifter never calibrated)."""
        if actuator in self.maps or self.ctl.actuators[actuator].calibration_origin == "measured":
            return float(self._map(actuator).value_at(volts))
        return 0.0 if volts == 0.0 else float(self._map(actuator).value_at(volts))

    def _coupler_volts(self, gate: str, how: str) -> float:
        coupler = self.ctl.gates[gate].coupler
        low, high = self._map(coupler).reachable()
        if how == "bar":
            return 0.0 if low <= 0.05 else self._volts_for(coupler, low)
        if how == "cross":
            return self._volts_for(coupler, min(high, 1.0))
        return self._volts_for(coupler, SPLIT)

    # ---------------------------------------------------------------- moving and reading

    async def _hold(self, volts: dict[str, float], exact: tuple[str, ...] = ()) -> None:
        """Every actuator at 0 V but those named; move only what changes. Named actuators whose
        crosstalk this run has measured (routing couplers) get the drive that cancels their
        neighbours' share; those in ``exact`` (the one being measured) get their volts as given."""
        target = {a: 0.0 for a in self.ctl.actuators}
        target.update(volts)
        shares = CrosstalkShares(self.run.crosstalk)
        if shares:
            routing = {a: v for a, v in volts.items() if a not in exact and a in self.run.crosstalk and v > 0.0}
            if routing:
                target.update(shares.drive_volts(routing, target))
        changes = {a: v for a, v in target.items() if abs(self.held.get(a, math.inf) - v) > 1e-9}
        if changes:
            await self.claim.move(changes, volts=True, journal=False)
            self.held.update(changes)

    async def _read(self, actuator: str, settle_s: float) -> dict[str, float]:
        await asyncio.sleep(settle_s)
        levels = await self.claim.read_monitors()
        self.run.frames += 1
        outcome = self.run.outcomes.setdefault(actuator, Outcome("failed"))
        outcome.frames += 1
        return {m: max(float(r["watts"]), 0.0) for m, r in levels.items()}  # noise below the dark level: none

    def _sweep_values(self, actuator: str, points: int | None = None) -> list[float]:
        """Sweep volts from 0 V, even in the table in force's logical value: a coupler to the
        hard limit; a phase shifter only to PHASE_SWEEP_TURNS turns (its phase grows ever faster
        near the top - many fringes in the last volts would be sampled too coarsely to fit)."""
        act = self.ctl.actuators[actuator]
        low, high = act.map.reachable()
        n = points or self.points
        if act.config.kind == "phase" and high - low > PHASE_SWEEP_TURNS * 2 * math.pi:
            table = act.map.table  # straight through the table: volts_for would wrap modulo 2 pi
            values = np.linspace(low, low + PHASE_SWEEP_TURNS * 2 * math.pi, n)
            volts = [0.0] + [float(np.interp(v, table.values, table.volts)) for v in values[1:]]
        else:
            values = np.linspace(low, high, n)
            volts = [0.0] + [float(act.map.volts_for(float(v))) for v in values[1:-1]] + [act.map.top_volts]
        return sorted({round(v, 6) for v in volts})

    # ---------------------------------------------------------------- the run

    async def check_laser(self) -> None:
        await self._hold({})
        levels = await self.claim.read_monitors()
        lit = []
        for monitor in self.ctl.config.chip.monitors:
            board = self.ctl.config.rack.board(monitor.input.board)
            if levels[monitor.id]["counts"] > LIT_FRACTION_OF_ADC * (1 << board.adc_bits):
                lit.append(monitor.id)
        if not lit:
            raise RefusedError(
                "the laser looks dark: no monitor reads above 1 % of its range with every actuator at 0 V; "
                "switch the light on (and check the fibre) before calibrating"
            )

    async def calibrate(self, wanted: set[str]) -> CalibrationRun:
        started = time.monotonic()
        order = calibration_order(self.topology)
        steps = [s for s in order.steps if self._actuator(s) in wanted]
        for gone in order.unobservable:
            actuator = self._part(gone.gate, gone.part)
            if actuator in wanted:
                self.run.outcomes[actuator] = Outcome("unobservable", gone.reason)
        for actuator in sorted(wanted):
            if actuator not in self.gate_of or self.gate_of[actuator] not in self.topology.gates:
                self.run.outcomes[actuator] = Outcome("unobservable", "its gate is not placed in chip.lattice")
        await self.check_laser()
        # The second pass comes after the steps: count the couplers it will likely read again
        # (those a shifter this run has a step for turns), so the bar does not sit at its end.
        phased = {self._actuator(s) for s in steps if s.part == "phase"}
        again = sum(
            1
            for s in steps
            if s.part == "coupler" and phased & {*self._own_phase_if_needed(s), *self._upstream_phase(s.gate)}
        )
        total = len(steps) + again
        for index, step in enumerate(steps):
            self.claim.check()
            actuator = self._actuator(step)
            if self.progress is not None:
                self.progress(index, total, actuator)
            try:
                if step.part == "coupler":
                    await self._coupler(step, actuator)
                else:
                    self._refit_with_measured_shares()
                    await self._phase(step, actuator)
            except MeshwardenError as exc:
                if self.claim.stopping:  # a stop, whatever the board said meanwhile (an abort, say)
                    if isinstance(exc, StoppedRefused):
                        raise
                    raise StoppedRefused(f"calibration stopped: {self.claim.stop_reason}") from exc
                self.run.outcomes.setdefault(actuator, Outcome("failed")).status = "failed"
                self.run.outcomes[actuator].reason = exc.message
        self._refit_with_measured_shares()
        await self._second_pass(len(steps), total)
        if self.progress is not None:
            self.progress(total, total, "")
        self.run.seconds = time.monotonic() - started
        return self.run

    def _part(self, gate: str, part: str) -> str:
        g = self.ctl.gates[gate]
        return str(g.coupler if part == "coupler" else g.phase)

    def _actuator(self, step: CalibrationStep) -> str:
        return self._part(step.gate, step.part)

    def _routing(self, step: CalibrationStep) -> dict[str, float]:
        return {self.ctl.gates[g].coupler: self._coupler_volts(g, how) for g, how in step.settings}

    def _half_turn_volts(self, phase_actuator: str) -> float:
        """Volts that turn a phase shifter by about pi from its 0 V phase (its table in force)."""
        amap = self.ctl.actuators[phase_actuator].map
        try:
            return float(amap.volts_for(amap.value_at(0.0) + math.pi))
        except MeshwardenError:
            return 0.0

    def _upstream_phase(self, gate: str) -> list[str]:
        """The phase shifter of the last gate before ``gate`` that feeds one of its inputs (its
        phase sets the relative phase of the two inputs), if any."""
        column, top = self.topology.gates[gate]
        feeding = [(c, g) for g, (c, t) in self.topology.gates.items() if c < column and t in (top, top + 1)]
        return [self.ctl.gates[max(feeding)[1]].phase] if feeding else []

    def _own_phase_if_needed(self, step: CalibrationStep) -> list[str]:
        """The gate's own phase shifter, when a later gate couples the same two modes again before
        the taps (then the bar and cross light meet there). Turning it only when needed keeps its
        drive, and so its crosstalk onto the coupler, out of the other readings."""
        column, top = self.topology.gates[step.gate]
        last = max(self.topology.taps[m][0] for m in (*step.bar_taps, *step.cross_taps))
        again = any(c > column and c <= last and t == top for c, t in self.topology.gates.values())
        return [self.ctl.gates[step.gate].phase] if again else []

    async def _coupler(self, step: CalibrationStep, actuator: str) -> None:
        """Each point is read twice: with the phase shifter feeding the gate's inputs (and its own,
        when needed) at 0, then at a half turn. Light that a gate at rest leaks into the other
        input (upstream) or mixes back with the other output (downstream) interferes with what the
        taps should see; each such term changes sign with one of the half turns, so the mean of
        the two readings is free of them (to first order in the leak and in the half turn's
        error). The sweep is even in the table in force's coupling ratio, with two more points
        below its first step (the flat start of a gap-closing coupler)."""
        routing = self._routing(step)
        settle = self.ctl.actuators[actuator].limit.dwell_s
        phases = [*self._own_phase_if_needed(step), *self._upstream_phase(step.gate)]
        turned = {p: self._half_turn_volts(p) for p in phases}
        states = [{p: 0.0 for p in phases}, turned] if phases else [{}]  # nothing to turn: one reading
        points: dict[float, tuple[float, float]] = {}

        async def measure(v: float) -> None:
            b = c = 0.0
            states.reverse()  # the last state of one point is the first of the next: no extra travel
            for state in states:
                await self._hold({**routing, actuator: v, **state})
                powers = await self._read(actuator, settle)
                b += sum(powers[m] for m in step.bar_taps) / len(states)
                c += sum(powers[m] for m in step.cross_taps) / len(states)
            points[v] = (b, c)

        sweep = self._sweep_values(actuator, max(6, self.points // 2 + 3))
        for v in sorted(set(sweep) | {round(sweep[1] * f, 6) for f in (0.35, 0.7)}):
            await measure(v)
        await self._past_full_transfer(actuator, points, measure)
        own = self.ctl.gates[step.gate].phase
        # Half of the readings had the own phase shifter at a half turn: per unit of its share on
        # the coupler, that much more V^2 on average.
        per_share = turned[own] ** 2 / len(states) if own in turned else 0.0
        extra = self._own_phase_share(step.gate) * per_share
        fit = self._coupler_fit(points, extra)
        for _ in range(COUPLER_GAP_FILLS):
            placed = [math.sqrt(v * v + extra) if v > 0 else 0.0 for v in points]
            if (middle := widest_gap_volts(fit, placed, MAX_KAPPA_GAP)) is None:
                break
            await measure(round(math.sqrt(max(middle * middle - extra, 0.0)), 6))
            fit = self._coupler_fit(points, extra)
        full = fit.full_transfer_volts
        for _ in range(COUPLER_REFINE_ROUNDS):  # pin full transfer down: a point on it reads the top
            if full is None or _point_on_top(fit, points):
                break
            await measure(round(full, 6))
            fit = self._coupler_fit(points, extra)
            full = fit.full_transfer_volts
        if not self._keep_coupler_fit(actuator, points, fit):
            return
        # Every coupler read at phase states is read again: two states that read alike do not
        # show that little light interferes (a shifter whose table in force is far off may have
        # turned by nearly a full turn; seed 777 left c46 0.025 off that way).
        if phases:
            self.revisit[actuator] = (step, tuple(phases), tuple(sorted(points)))
        bar, cross = zip(*(points[v] for v in sorted(points)), strict=True)
        weights = balance_weights(bar, cross) or (1.0, 1.0)
        await self._coupler_crosstalk(step, actuator, routing, settle, weights)
        if own not in self.run.crosstalk.get(actuator, {}):  # not measurable here: the others' median
            self.stand_ins.add((actuator, own))
            if per_share:
                self.refit[actuator] = (dict(points), per_share, step)
            if stand_in := self._own_phase_share(step.gate):
                self.run.crosstalk.setdefault(actuator, {})[own] = round(stand_in, 6)

    def _keep_coupler_fit(self, actuator: str, points: dict[float, tuple[float, float]], fit: CouplerTableFit) -> bool:
        """Record a coupler's sweep and fit; take its table for the rest of the run if it passes its gate."""
        outcome = self.run.outcomes[actuator]
        outcome.sweep = sweep_record(
            "kappa",
            sorted(points),
            list(fit.measured_kappa),
            list(fit.fitted_kappa),
            _table_for_plot(fit),
            fit.residual_rms / MAX_RESIDUAL_KAPPA,
        )
        verdict = coupler_gate(fit, needed_low=0.5, needed_high=0.5)  # the range is reported, not demanded
        outcome.points, outcome.residual = fit.points_used, fit.residual_rms
        if not verdict.ok:
            outcome.status, outcome.reason = "failed", verdict.reason
            return False
        outcome.table = fit.to_calibration(actuator, self.run.version, note="measured in place: bar/cross sweep")
        outcome.status, outcome.reason = "ok", ""
        self._take(actuator, outcome.table)
        return True

    async def _second_pass(self, done: int, total: int) -> None:
        """Couplers read at half turns of phase shifters not yet calibrated are read again, now
        that those are: at every combination of exact half turns (see :meth:`_coupler_again`).
        A coupler whose second reading a refusal ends keeps its first table, and says why."""
        for actuator, (step, phases, volts) in sorted(self.revisit.items()):
            # A shifter this run could not calibrate sees (next to) no light: it stays at 0 V.
            phases = tuple(p for p in phases if p in self.maps)
            if self.run.outcomes[actuator].status != "ok" or not phases:
                continue
            self.claim.check()
            if self.progress is not None:
                self.progress(min(done, total - 1), total, actuator)
            done += 1
            outcome = self.run.outcomes[actuator]
            first = (outcome.table, outcome.sweep, outcome.points, outcome.residual)
            try:
                await self._coupler_again(step, actuator, phases, volts)
            except MeshwardenError as exc:
                if self.claim.stopping:
                    if isinstance(exc, StoppedRefused):
                        raise
                    raise StoppedRefused(f"calibration stopped: {self.claim.stop_reason}") from exc
                outcome.table, outcome.sweep, outcome.points, outcome.residual = first
                outcome.status, outcome.reason = "ok", f"first reading kept: the second ended with: {exc.message}"
                if first[0] is not None:
                    self._take(actuator, first[0])
        self.revisit.clear()

    async def _coupler_again(
        self, step: CalibrationStep, actuator: str, phases: tuple[str, ...], volts: tuple[float, ...]
    ) -> None:
        """Read a coupler's sweep again at every combination of 0 and an exact half turn of the
        phase shifters whose light interferes at its taps (tables of this run). Light leaked
        upstream (its phase turned by the shifter feeding the inputs), light a gate at rest mixes
        back downstream (turned by the gate's own shifter) and their product each change sign with
        one of the half turns or with both; the mean over all combinations keeps only the
        incoherent sum, which :func:`fit_coupler_angle_table` takes out as a second input's
        share where the sweep crosses full transfer, and :meth:`_mixed_share` measures where it
        does not. The own shifter's crosstalk is cancelled in the coupler's drive where it can be."""
        routing = self._routing(step)
        settle = self.ctl.actuators[actuator].limit.dwell_s
        own = self.ctl.gates[step.gate].phase
        share = self._own_phase_share(step.gate) if own in phases else 0.0
        # Gray-code order, reversed at every other point: one shifter moves between readings
        # (a half turn is tens of volts, ramped in guarded steps: the run's time is mostly these).
        gray = [i ^ (i >> 1) for i in range(1 << len(phases))]
        choices = [tuple(math.pi * ((g >> j) & 1) for j in range(len(phases))) for g in gray]
        snake = list(choices)
        points: dict[float, tuple[float, float]] = {}
        readings: dict[float, list[tuple[float, float]]] = {}  # sweep volts -> (bar, cross) per choice

        async def read(v: float, turns: tuple[float, ...]) -> tuple[float, float, float]:
            """Bar and cross powers with the shifters turned by ``turns`` (rad; the coupler's
            and the shifters' drives are set in two rounds: each one's drive sets the other's
            crosstalk), and the coupler's V_eq^2."""
            drives = {**routing, actuator: v, **{p: 0.0 for p in phases}}
            for _ in range(2):
                for p, turn in zip(phases, turns, strict=True):
                    drives[p] = self._turn_drive(p, drives, turn) if turn else 0.0
                drives[actuator] = math.sqrt(max(v * v - share * drives.get(own, 0.0) ** 2, 0.0))
            await self._hold(drives, exact=(actuator, *phases))
            powers = await self._read(actuator, settle)
            squared = drives[actuator] ** 2 + share * drives.get(own, 0.0) ** 2
            return sum(powers[m] for m in step.bar_taps), sum(powers[m] for m in step.cross_taps), squared

        async def measure(v: float) -> None:
            snake.reverse()
            by_turns = {turns: await read(v, turns) for turns in snake}
            rows = [by_turns[turns] for turns in choices]
            readings[v] = [(b, c) for b, c, _ in rows]
            mean = [sum(column) / len(rows) for column in zip(*rows, strict=True)]
            # A table starts at 0 V: the point at 0 V stays there (kappa is flat at the bottom).
            points[math.sqrt(mean[2]) if v > 0 else 0.0] = (mean[0], mean[1])

        for v in volts:
            await measure(v)
        fit = self._coupler_fit(points)
        for _ in range(COUPLER_GAP_FILLS):
            if (middle := widest_gap_volts(fit, list(points), MAX_KAPPA_GAP)) is None:
                break
            await measure(round(middle, 6))
            fit = self._coupler_fit(points)
        for _ in range(COUPLER_REFINE_ROUNDS):
            full = fit.full_transfer_volts
            if full is None or _point_on_top(fit, points):
                break
            await measure(round(full, 6))
            fit = self._coupler_fit(points)
        if fit.full_transfer_volts is None:
            mixed = await self._mixed_share(phases, choices, readings, points, read)
            if mixed > 0.0:
                fit = self._coupler_fit(points, known_share=mixed)
        outcome = self.run.outcomes[actuator]
        first = (outcome.table, outcome.sweep, outcome.points, outcome.residual)
        if not self._keep_coupler_fit(actuator, points, fit) and first[0] is not None:
            reason = outcome.reason  # the first reading's table stands, with its own record
            outcome.table, outcome.sweep, outcome.points, outcome.residual = first
            outcome.status, outcome.reason = "ok", f"first reading kept: the second failed its gate: {reason}"
            self._take(actuator, first[0])

    async def _mixed_share(
        self,
        phases: tuple[str, ...],
        choices: list[tuple[float, ...]],
        readings: dict[float, list[tuple[float, float]]],
        points: dict[float, tuple[float, float]],
        read: Callable[[float, tuple[float, ...]], Awaitable[tuple[float, float, float]]],
    ) -> float:
        """The incoherent share mixed into a coupler's reading, for a sweep that cannot reach full
        transfer (where the fold would show it): at the sweep point nearest a split, each shifter
        is also turned a quarter and three quarters (the others at 0 and a half turn, averaged),
        which with its 0 and half-turn readings gives the full swing of the light it turns
        (four-step phase stepping); each swing gives its share
        (:func:`mixed_share_from_swing`), and the shares combine (:func:`combined_share`)."""
        bar, cross = zip(*(points[v] for v in sorted(points)), strict=True)
        weights = balance_weights(bar, cross) or (1.0, 1.0)

        def ratio(b: float, c: float) -> float:
            return weights[1] * c / (weights[0] * b + weights[1] * c) if b + c > 0 else math.nan

        def mean_ratio(rows: list[tuple[float, float]]) -> float:
            return ratio(sum(b for b, _ in rows) / len(rows), sum(c for _, c in rows) / len(rows))

        at = min(readings, key=lambda v: abs(mean_ratio(readings[v]) - SPLIT))
        level = mean_ratio(readings[at])
        if not 0.05 < level < 0.95:
            return 0.0
        swings = []
        for i in range(len(phases)):
            samples = {}
            for turn in (0.0, math.pi):
                rows = [r for r, c in zip(readings[at], choices, strict=True) if c[i] == turn]
                samples[turn] = mean_ratio(rows)
            for turn in (math.pi / 2, 3 * math.pi / 2):
                rows = []
                for c in choices:
                    if c[i] == 0.0:
                        b, cr, _ = await read(at, (*c[:i], turn, *c[i + 1 :]))
                        rows.append((b, cr))
                samples[turn] = mean_ratio(rows)
            stepped = four_step_phase([samples[t] for t in (0.0, math.pi / 2, math.pi, 3 * math.pi / 2)])
            swings.append(stepped.amplitude)
        kappa = level
        share = 0.0
        for _ in range(3):  # the swing's own kappa is the corrected one
            share = combined_share([mixed_share_from_swing(kappa, s) for s in swings])
            kappa = min(max((level - share) / (1.0 - 2.0 * share), 0.01), 0.99)
        return share

    def _turn_drive(self, phase: str, drives: dict[str, float], turn_rad: float) -> float:
        """Volts that turn a calibrated phase shifter by exactly ``turn_rad`` from where it is at
        0 V with the other ``drives`` (its own coupler's crosstalk moves it a little even then)."""
        coupler = self.ctl.gates[self.gate_of[phase]].coupler
        base = self.run.crosstalk.get(phase, {}).get(coupler, 0.0) * drives.get(coupler, 0.0) ** 2
        target = self._volts_for(phase, self._value_at(phase, math.sqrt(base)) + turn_rad)
        return math.sqrt(max(target * target - base, 0.0))

    def _coupler_neighbours(self, step: CalibrationStep) -> list[str]:
        """The actuators whose drive may act on a gate's coupler: the couplers of the gates side by
        side with it in its column, and the gate's own phase shifter (unless a later gate meets the
        coupler's outputs before the taps: then the phase moves the readings by interference too,
        and the share measured on the other gates stands in for it)."""
        column, top = self.topology.gates[step.gate]
        beside = [g for g, (c, t) in self.topology.gates.items() if c == column and abs(t - top) == 2]
        own = [] if self._own_phase_if_needed(step) else [self.ctl.gates[step.gate].phase]
        return [self.ctl.gates[g].coupler for g in sorted(beside)] + own

    async def _coupler_crosstalk(
        self,
        step: CalibrationStep,
        actuator: str,
        routing: dict[str, float],
        settle: float,
        weights: tuple[float, float] = (1.0, 1.0),
    ) -> None:
        """Measure the share of each neighbour's V^2 acting on this coupler: hold it at its split
        (where kappa moves most with drive), read kappa with every neighbour at 0 V and with one
        neighbour at a time driven to half its top and to its top; the shift read through the
        fresh table is the extra V^2 the neighbour gave (:func:`meshwarden.crosstalk.share_from_shift`).
        Each port is weighted as the table's points were (``weights``: the sweep's
        :func:`balance_weights`), so a change reads on the table's own scale; the plain ratio
        shrinks it by the two paths' imbalance (0.0188 read for a simulated 0.02 where the cross
        light passes a gate at rest). For the gate's own phase shifter, only the port off its arm
        counts (:meth:`_phase_arm_port`)."""
        amap = self.maps[actuator]
        low, high = amap.reachable()
        if not low < SPLIT < high:
            return
        own = amap.volts_for(SPLIT)

        async def ports(extra: dict[str, float]) -> tuple[float, float]:
            await self._hold({**routing, actuator: own, **extra}, exact=(actuator,))
            powers = await self._read(actuator, settle)
            bar = sum(powers[m] for m in step.bar_taps)
            return weights[0] * bar, weights[1] * sum(powers[m] for m in step.cross_taps)

        neighbours = [n for n in self._coupler_neighbours(step) if n not in routing and self._map(n).top_volts > 0]
        if not neighbours:
            return
        b0, c0 = await ports({})
        if not b0 + c0 > 0:
            return
        arm = self._phase_arm_port(step)
        base = c0 / (b0 + c0)

        async def share_at(neighbour: str, drive: float) -> float | None:
            """The share a reading with ``neighbour`` at ``drive`` gives; None where the shift
            leaves the table or reaches its top (past full transfer a shift reads back smaller)."""
            b1, c1 = await ports({neighbour: drive})
            if neighbour == self.ctl.gates[step.gate].phase and arm == "bar":
                shifted = c1 / (b0 + c0)  # the driven arm's own loss dims the bar port: use the other
            elif neighbour == self.ctl.gates[step.gate].phase and arm == "cross":
                shifted = 1.0 - b1 / (b0 + c0)
            else:
                shifted = c1 / (b1 + c1) if b1 + c1 > 0 else math.nan
            value = amap.value_at(own) + (shifted - base)
            if not (math.isfinite(value) and low < value < high - CROSSTALK_TOP_MARGIN):
                return None
            return max(share_from_shift(own, amap.volts_for(value), drive), 0.0)

        for neighbour in neighbours:
            top = min(self._map(neighbour).top_volts, self.ctl.actuators[neighbour].limit.hard_limit_volts)
            # At half its top the neighbour gives a quarter of the shift: a large share stays on
            # the rising side there, where at the top it might fold past full transfer and read
            # small, and a neighbour driven to its top reroutes the leaks of its own gate (the
            # demo's c30 at its top made c31's share read 0.0074 against 0.0097 at half drive,
            # the simulator's 0.01). The top's reading (four times the signal) is kept only
            # where the two agree closely.
            half = await share_at(neighbour, top / 2)
            full = await share_at(neighbour, top)
            agree = half is not None and full is not None and abs(full - half) <= 0.1 * half + CROSSTALK_AGREE
            share = full if agree else half
            if share is not None:
                self.run.crosstalk.setdefault(actuator, {})[neighbour] = round(share, 6)

    def _phase_arm_port(self, step: CalibrationStep) -> str | None:
        """Which port's taps see the gate's phase arm (its top mode): "bar", "cross" or None.
        Driving a phase shifter dims its own arm a little (its loss grows with the phase), which a
        ratio would read as coupling; the other port, against the total before, does not."""
        top = self.topology.gates[step.gate][1]
        for port, taps in (("bar", step.bar_taps), ("cross", step.cross_taps)):
            if taps and all(self.topology.taps[m][1] == top for m in taps):
                return port
        return None

    @staticmethod
    def _coupler_fit(
        points: dict[float, tuple[float, float]], extra_squared: float = 0.0, known_share: float | None = None
    ) -> CouplerTableFit:
        """The angle-space fit; ``extra_squared`` (V^2) is the mean crosstalk drive the sweep's
        readings carried, added to every point above 0 V so the table is the coupler's alone;
        ``known_share`` the light mixed in, measured apart (for a sweep short of full transfer)."""
        volts = sorted(points)
        placed = [math.sqrt(v * v + extra_squared) if v > 0 else 0.0 for v in volts]
        bar, cross = [points[v][0] for v in volts], [points[v][1] for v in volts]
        return fit_coupler_angle_table(placed, bar, cross, known_share=known_share)

    def _own_phase_share(self, gate: str) -> float:
        """The share of a gate's own phase shifter's V^2 on its coupler: measured on this gate if
        it was, else the median of the gates of this run that were (one design, one layout)."""
        coupler, phase = self.ctl.gates[gate].coupler, self.ctl.gates[gate].phase
        if phase in self.run.crosstalk.get(coupler, {}) and (coupler, phase) not in self.stand_ins:
            return self.run.crosstalk[coupler][phase]
        measured = [
            row[g.phase]
            for g in self.ctl.gates.values()
            if g.phase in (row := self.run.crosstalk.get(g.coupler, {})) and (g.coupler, g.phase) not in self.stand_ins
        ]
        return float(np.median(measured)) if measured else 0.0

    def _refit_with_measured_shares(self) -> None:
        """Couplers fitted before any own-phase share was measured (the first columns come first)
        are fitted again from their stored points with the median measured since, before any
        phase shifter is calibrated through them."""
        for actuator, (points, per_share, step) in list(self.refit.items()):
            share = self._own_phase_share(step.gate)
            fit = self._coupler_fit(points, share * per_share)
            outcome = self.run.outcomes[actuator]
            if coupler_gate(fit, needed_low=0.5, needed_high=0.5).ok:
                outcome.table = fit.to_calibration(
                    actuator, self.run.version, note="measured in place: bar/cross sweep"
                )
                outcome.points, outcome.residual = fit.points_used, fit.residual_rms
                self._take(actuator, outcome.table)
            if share > 0.0:
                self.run.crosstalk.setdefault(actuator, {})[self.ctl.gates[step.gate].phase] = round(share, 6)
        self.refit.clear()

    async def _past_full_transfer(
        self,
        actuator: str,
        points: dict[float, tuple[float, float]],
        measure: Callable[[float], Awaitable[None]],
    ) -> None:
        """Extend a coupler's sweep above the table in force, in small steps up to the hard limit,
        until the coupling has clearly turned over (full transfer lies behind the last point):
        fabrication spread puts a real coupler's full transfer above or below the design's."""
        act = self.ctl.actuators[actuator]
        step_v = max(COUPLER_EXTEND_FRACTION * act.map.top_volts, 2 * act.limit.lsb_volts)

        def turned() -> bool:
            ratios = [c / (b + c) if b + c > 0 else 0.0 for b, c in (points[v] for v in sorted(points))]
            return max(ratios) - ratios[-1] > COUPLER_TURN_DROP

        v = max(points)
        while not turned() and v + step_v <= act.limit.hard_limit_volts:
            v = round(v + step_v, 6)
            try:
                await measure(v)
            except (LimitRefused, OutOfRangeRefused) as exc:  # the guard's word is final
                self.ctl.log.info("coupler sweep stops below the hard limit", actuator=actuator, volts=v, why=str(exc))
                return

    async def _phase(self, step: CalibrationStep, actuator: str) -> None:
        routing = self._routing(step)
        act = self.ctl.actuators[actuator]
        kappa = {g: (0.0 if how == "bar" else 1.0 if how == "cross" else SPLIT) for g, how in step.settings}
        others = {gid: self._value_at(g.phase, 0.0) for gid, g in self.ctl.gates.items() if g.phase != actuator}
        reference, contrast = fringe_reference(self.topology, step.gate, step.fringe_taps, kappa, others)
        outcome = self.run.outcomes.setdefault(actuator, Outcome("failed"))
        if contrast < 0.2:
            outcome.status, outcome.reason = "unobservable", f"the model's fringe contrast is only {contrast:.2f}"
            return
        coupler = self.ctl.gates[step.gate].coupler
        coupler_share = self._own_phase_share(step.gate)  # stand-in: the coupler's share on its phase
        volts, placed, power = [], [], []
        sweep = self._sweep_values(actuator)
        # Even in phase, a sweep's first step spans most of the volts (the phase grows ever faster):
        # two points inside it pin the fit's shape there, where the table is used too.
        for v in sorted(set(sweep) | {round(sweep[1] * f, 6) for f in PHASE_LOW_FRACTIONS}):
            await self._hold({**routing, actuator: v})
            powers = await self._read(actuator, act.limit.dwell_s)
            volts.append(v)
            # The gate's own coupler is driven (at its split) through the sweep: its share of V^2
            # moved the phase shifter too; place each point where its drive alone would be.
            placed.append(math.sqrt(v * v + coupler_share * self.held.get(coupler, 0.0) ** 2))
            power.append(sum(powers[m] for m in step.fringe_taps))
        outcome.sweep = sweep_record("power_w", volts, power)
        fit = fit_fringe(placed, power, with_growth=True, with_loss=True)
        share = fit.residual_rms / fit.amplitude / MAX_RESIDUAL_FRACTION if fit.amplitude > 0 else None
        outcome.sweep = sweep_record("power_w", volts, power, list(fit.power_at(placed)), fit.model(), share)
        table = build_phase_table(fit, hard_limit_volts=act.limit.hard_limit_volts, reference_rad=reference)
        outcome.points, outcome.residual = fit.points, fit.residual_rms
        if table.status != "ok":
            outcome.status, outcome.reason = "failed", table.reason
            return
        outcome.table = table.to_calibration(actuator, self.run.version, note="measured in place: fringe sweep")
        outcome.status, outcome.reason = "ok", ""
        self._take(actuator, outcome.table)
        if coupler_share > 0.0:  # so that requests cancel it (meshwarden.crosstalk)
            self.run.crosstalk.setdefault(actuator, {})[coupler] = round(coupler_share, 6)


async def calibrate(
    controller: Any,
    *,
    targets: list[str] | None,
    points: int | None,
    owner: str,
    version: str,
    progress: Progress | None = None,
    on_claim: Callable[[Claim], None] | None = None,
) -> CalibrationRun:
    """Run a calibration under a held claim on the whole chip; outputs end where they began."""
    n = DEFAULT_POINTS if points is None else points
    if isinstance(n, bool) or not isinstance(n, int) or not MIN_POINTS <= n <= MAX_POINTS:
        raise RefusedError(f"calibrate: points must be {MIN_POINTS} to {MAX_POINTS}, got {points!r}")
    wanted = expand_targets(controller, targets)
    topology_of(controller)  # refuse before taking the claim
    async with controller.claim(list(controller.actuators), owner=owner, purpose="calibration") as claim:
        if on_claim is not None:
            on_claim(claim)
        start = {a: controller.describe(a)["volts"] for a in controller.actuators}
        calibrator = Calibrator(controller, claim, version, n, progress)
        calibrator.held = dict(start)
        try:
            return await calibrator.calibrate(wanted)
        finally:
            # After a cancel too: outputs end where they began. Disarm and estop end the claim
            # and take the outputs over themselves.
            if claim.resume_for_cleanup() and controller.armed and not controller.estopped:
                await claim.move(start, volts=True, journal=True)


async def calibration_job(
    controller: Any,
    *,
    targets: list[str] | None = None,
    points: int | None = None,
    activate: bool = True,
    client: str | None = None,
    name: str = "",
    progress: Progress | None = None,
    on_claim: Callable[[Claim], None] | None = None,
) -> dict[str, Any]:
    """Calibrate, store a new immutable version (this run's tables where they passed their gate,
    the active ones elsewhere), activate it if asked and anything passed; the pinned report."""
    from meshwarden.calibration_store import config_hash

    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    version = f"cal-{stamp}" + (f"-{name}" if name else "")
    owner = f"calibrate:{name or stamp}"
    run = await calibrate(
        controller, targets=targets, points=points, owner=owner, version=version, progress=progress, on_claim=on_claim
    )
    tables = controller.active_tables()
    tables.update(run.tables())
    manifest = {
        "format": "meshwarden-calibration-version/1",
        "version": version,
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "method": "in-place sweeps through the chip's monitors: bar/cross ratio for couplers, "
        "fringe fit for phase shifters",
        "points_per_sweep": points or DEFAULT_POINTS,
        "configuration_hash": config_hash(controller.config.source),
        "frames": run.frames,
        "seconds": round(run.seconds, 3),
        "client": client,
        "actuators": {a: o.as_dict() for a, o in sorted(run.outcomes.items())},
        "crosstalk": controller.crosstalk.merged(CrosstalkShares(run.crosstalk)).as_data(),
    }
    controller.calibrations.write(version, tables, manifest, sweeps=run.sweeps())
    activated = False
    if activate and run.tables():
        await controller.activate_calibration(version, client=client)
        activated = True
    return {
        "version": version,
        "activated": activated,
        "frames": run.frames,
        "seconds": round(run.seconds, 3),
        "actuators": {a: o.as_dict() for a, o in sorted(run.outcomes.items())},
    }
