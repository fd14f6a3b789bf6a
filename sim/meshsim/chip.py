"""The simulated chip: every actuator's motion, charging and failure, and the light through the lattice.

The chip knows nothing about boards or bytes. It is told, at a simulated time, which voltage
each actuator's terminals now see (:meth:`SimChip.apply_volts`), and answers what the light
does (:meth:`SimChip.tap_powers_w`). Ground truth - true displacements, phases, couplings,
pulled-in and stuck actuators - is available through :meth:`SimChip.truth` for tests only; the
daemon sees the chip only through monitors and sense readings, as in a lab.

Failure physics:

* parallel-plate couplers pull in statically above V_PI, or dynamically when a step's first
  overshoot reaches the contact (dynamic pull-in); in contact they stay down until the voltage
  falls below the pull-out voltage; at release, with the device's stiction probability, they
  stay stuck for good;
* comb-drive phase shifters snap sideways when the (peak) displacement passes their lateral
  snap displacement; they release below half the snap voltage, or stay stuck likewise;
* dielectric charging: the effective voltage is V - V_shift, where V_shift relaxes toward
  ``charging_fraction * V`` with the device's time constant (minutes), and back to zero when
  the bias is removed - a first-order stand-in for the linear-then-logarithmic charging of
  Wibbeler et al. 1998.

What makes the optics as hard as a real chip (all evaluated when the optics are read):

* fabrication errors (:mod:`meshsim.fabrication`): a static phase error per phase arm, uniform
  in [0, 2 pi), and a splitting-angle error per coupler;
* electrostatic crosstalk (:mod:`meshsim.crosstalk`): neighbours' drive moves each actuator a
  little, quasi-statically, on top of its own motion;
* insertion loss of the phase arm that grows with the actuated phase;
* drift (:mod:`meshsim.physics.drift`): a random walk per arm and common temperature steps, a
  function of simulated time.

The phase the light sees at a gate is (static + actuated + drift) mod 2 pi.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from meshsim.crosstalk import equivalent_squared_volts, neighbour_matrix
from meshsim.devices import CombArrays, PlateArrays, comb_arrays, plate_arrays, plate_roots
from meshsim.dynamics import PlateSteps, Ringing
from meshsim.fabrication import draw_fabrication
from meshsim.params import SimParams
from meshsim.physics import optics
from meshsim.physics.drift import PhaseDrift
from meshsim.scenario import Scenario

F = NDArray[np.float64]
I = NDArray[np.int64]  # noqa: E741


@dataclass(frozen=True)
class ChipTruth:
    """A snapshot of the chip's real state, for tests and inspection.

    Per actuator: volts, displacement (own drive plus crosstalk), pulled-in and stuck flags.
    Per gate: ``kappa`` is the coupling the light sees (splitting error and crosstalk included);
    ``phase_rad`` is only what the actuator adds (its own drive plus crosstalk, relative to rest);
    ``mesh_phase_rad`` is the phase the light sees, (static + actuated + drift) mod 2 pi, with its
    parts ``static_phase_rad`` and ``drift_phase_rad``; ``splitting_angle_rad`` is the coupler's
    fabrication error; ``insertion_loss_db`` the phase arm's loss (gate, transitions and the
    phase-dependent part).
    """

    time_s: float
    actuator_ids: tuple[str, ...]
    terminal_volts: F
    effective_volts: F
    displacement_m: F
    pulled_in: NDArray[np.bool_]
    stuck: NDArray[np.bool_]
    gate_ids: tuple[str, ...]
    kappa: F
    phase_rad: F
    tap_power_w: F
    mesh_phase_rad: F
    static_phase_rad: F
    drift_phase_rad: F
    splitting_angle_rad: F
    insertion_loss_db: F


@dataclass(frozen=True)
class GateOptics:
    """What the light meets at each gate at one time."""

    kappa: F
    actuated_phase_rad: F
    drift_phase_rad: F
    mesh_phase_rad: F
    arm_loss_db: F


class SimChip:
    """All actuators of one chip, the optical lattice and its taps."""

    def __init__(self, scenario: Scenario, params: SimParams, rng: np.random.Generator) -> None:
        self.params = params
        self.ids = tuple(a.id for a in scenario.actuators)
        self.index = {aid: i for i, aid in enumerate(self.ids)}
        kinds = np.array([a.kind for a in scenario.actuators])
        self.couplers: I = np.flatnonzero(kinds == "coupler")
        self.phases: I = np.flatnonzero(kinds == "phase")
        n = len(self.ids)
        spread = params.spread
        # Fabrication spread, drawn once per actuator in a fixed order so a seed reproduces a chip.
        spring_scale = 1.0 + spread.spring_rel * rng.standard_normal(n)
        gap_scale = 1.0 + spread.gap_rel * rng.standard_normal(n)
        optical_scale = 1.0 + spread.optical_gap_rel * rng.standard_normal(n)
        c, p = self.couplers, self.phases
        self.plate: PlateArrays = plate_arrays(params.coupler, len(c), spring_scale[c], gap_scale[c], optical_scale[c])
        self.comb: CombArrays = comb_arrays(params.phase, len(p), spring_scale[p], optical_scale[p])

        self.terminal_volts = np.zeros(n)
        self.shift_volts = np.zeros(n)
        self.shift_time = 0.0
        self.charging_fraction = np.zeros(n)
        self.charging_time = np.ones(n)
        self.charging_fraction[c] = params.coupler.charging_fraction
        self.charging_time[c] = params.coupler.charging_time_s
        self.charging_fraction[p] = params.phase.charging_fraction
        self.charging_time[p] = params.phase.charging_time_s
        self.stiction = np.zeros(n)
        self.stiction[c] = params.coupler.stiction_probability
        self.stiction[p] = params.phase.stiction_probability

        self.pulled_in = np.zeros(n, dtype=bool)
        self.stuck = np.zeros(n, dtype=bool)
        self.stuck_at = np.zeros(n)
        self.ringing = Ringing(n)
        self._rng = rng
        self._build_mechanics(n)

        self.gate_ids = tuple(g[0] for g in scenario.gates)
        self.gate_coupler = np.array([self.index[g[1]] for g in scenario.gates], dtype=int)
        self.gate_phase = np.array([self.index[g[2]] for g in scenario.gates], dtype=int)
        self.monitor_ids = tuple(m.id for m in scenario.monitors)
        self.lattice = self._build_lattice(scenario, params)
        loss_db = (
            params.coupler.loss_db
            + params.phase.loss_db
            + 2 * (params.lattice.transition_loss_db if params.lattice else 0.0)
        )
        self.gate_loss_db = loss_db
        self.gate_loss_amplitude = np.full(len(self.gate_ids), float(optics.db_to_amplitude(loss_db)))

        # Imperfections of the optics, each from its own seeded stream (the draws above are untouched).
        fabrication_seed, drift_seed = _child_seeds(rng, 2)
        self.fabrication = draw_fabrication(params.spread, len(self.gate_ids), fabrication_seed)
        self.crosstalk_shares = neighbour_matrix(
            n, self.gate_coupler, self.gate_phase, self._gate_positions(params), params.crosstalk
        )
        drift = params.drift
        self.drift = PhaseDrift(
            len(self.gate_ids),
            drift_seed,
            drift.random_walk_rad_per_sqrt_s,
            drift.temperature_steps,
            drift.temperature_step_interval_s,
            drift.temperature_step_rad,
        )

    # ---------------------------------------------------------------- construction helpers

    def _build_lattice(self, scenario: Scenario, params: SimParams) -> optics.Lattice | None:
        spec = params.lattice
        if spec is None:
            return None
        gate_index = {gid: i for i, gid in enumerate(self.gate_ids)}
        monitor_index = {mid: i for i, mid in enumerate(self.monitor_ids)}
        columns = tuple(tuple((gate_index[g], top) for g, top in col) for col in spec.columns)
        taps: list[tuple[int, int]] = [(-2, 0)] * len(self.monitor_ids)
        for mid, after, mode in spec.taps:
            taps[monitor_index[mid]] = (after, mode)
        layout = optics.LatticeLayout(spec.modes, columns, tuple(taps), spec.tap_fraction)
        return optics.Lattice(layout)

    def _gate_positions(self, params: SimParams) -> dict[int, tuple[int, int]]:
        """Gate index -> (column, top mode) in the lattice, for the gates it places."""
        if params.lattice is None:
            return {}
        gate_index = {gid: i for i, gid in enumerate(self.gate_ids)}
        return {gate_index[g]: (c, top) for c, col in enumerate(params.lattice.columns) for g, top in col}

    # ---------------------------------------------------------------- mechanics

    def _build_mechanics(self, n: int) -> None:
        """Per-actuator constants of the mechanics, computed once: each actuator's kind and place
        among its kind, its statics, where it rests when snapped, when it releases, and the plates'
        step solver."""
        c, p = self.couplers, self.phases
        plate, comb = self.plate, self.comb
        self.is_coupler = np.zeros(n, dtype=bool)
        self.is_coupler[c] = True
        self.kind_position = np.zeros(n, dtype=np.int64)
        self.kind_position[c] = np.arange(len(c))
        self.kind_position[p] = np.arange(len(p))
        # Statics of both kinds in one formula (see _equilibrium): x = g u_e(a) + V^2 F(1 V) / k, with
        # the plate terms zero for combs (g = 0, a = 0) and the comb term zero for plates.
        self.plate_gap_m = np.zeros(n)
        self.plate_gap_m[c] = plate.electrical_gap
        self.plate_a_per_v2 = np.zeros(n)
        self.plate_a_per_v2[c] = (4.0 / 27.0) / plate.pull_in_volts**2
        self.comb_m_per_v2 = np.zeros(n)
        self.comb_m_per_v2[p] = comb.force(np.ones(len(p))) / comb.spring
        self.contact_m = np.zeros(n)
        self.contact_m[c] = plate.air_gap
        self.contact_m[p] = comb.snap_displacement
        self.release_volts = np.zeros(n)
        self.release_volts[c] = plate.pull_out_volts
        self.release_volts[p] = 0.5 * comb.lateral_snap_volts
        self.plate_steps = PlateSteps(
            plate.mass, plate.damping, plate.spring, plate.area, plate.electrical_gap, plate.air_gap
        )
        self.comb_w = np.sqrt(comb.spring / comb.mass)
        self.comb_zeta = comb.damping / (2.0 * np.sqrt(comb.spring * comb.mass))

    def _equilibrium(self, index: I | slice, effective: F) -> F:
        """Static displacement of the actuators ``index`` at ``effective`` volts (NaN above plate pull-in)."""
        v2 = effective * effective
        u_e = plate_roots(self.plate_a_per_v2[index] * v2)[0]
        return np.asarray(self.plate_gap_m[index] * u_e + self.comb_m_per_v2[index] * v2)

    def _advance_charging(self, t: float) -> None:
        dt = t - self.shift_time
        if dt <= 0.0:
            return
        target = self.charging_fraction * self.terminal_volts
        self.shift_volts = target + (self.shift_volts - target) * np.exp(-dt / self.charging_time)
        self.shift_time = t

    def effective_volts(self, t: float) -> F:
        """Terminal voltage less the dielectric charging shift."""
        self._advance_charging(t)
        return self.terminal_volts - self.shift_volts

    def displacement(self, t: float) -> F:
        """True displacement of every actuator at time ``t``."""
        self._advance_charging(t)
        return self._motion(t, slice(None))[0]

    def _motion(self, t: float, index: I | slice) -> tuple[F, F]:
        """Displacement and velocity of the actuators ``index`` at ``t`` (charging advanced to ``t``)."""
        x_eq = self._equilibrium(index, self.terminal_volts[index] - self.shift_volts[index])
        y, v = self.ringing.state(t, index)
        x = np.fmax(x_eq, 0.0) + y  # fmax: NaN (no equilibrium) -> 0; equilibria are never negative
        pulled, stuck = self.pulled_in[index], self.stuck[index]
        if pulled.any() or stuck.any():
            x = np.where(pulled, self.contact_m[index], x)
            x = np.where(stuck, self.stuck_at[index], x)
        return x, v

    def apply_volts(self, index: I, volts: F, t: float) -> None:
        """The terminals of actuators ``index`` see ``volts`` from time ``t`` on (a step)."""
        index = np.asarray(index, dtype=int)
        volts = np.asarray(volts, dtype=float)
        changed = self.terminal_volts[index] != volts
        if not changed.any():
            return
        index, volts = index[changed], volts[changed]
        self._advance_charging(t)
        x_before, v_before = self._motion(t, index)
        self.terminal_volts[index] = volts
        eff = volts - self.shift_volts[index]
        if not (self.pulled_in[index] | self.stuck[index]).any():
            self._step_dynamics(index, x_before, v_before, eff, t)
            return
        self._release_check(index, eff)
        free = ~self.pulled_in[index] & ~self.stuck[index]
        self._step_dynamics(index[free], x_before[free], v_before[free], eff[free], t)

    def _release_check(self, index: I, eff: F) -> None:
        """Pulled-in actuators whose voltage fell low enough spring back - or stay stuck."""
        pulled = self.pulled_in[index]
        if not pulled.any():
            return
        releasing = pulled & (np.abs(eff) < self.release_volts[index])
        for i in index[releasing]:
            self.pulled_in[i] = False
            if self._rng.random() < self.stiction[i]:
                self.stuck[i] = True
                self.stuck_at[i] = self.contact_m[i]
            else:
                self.ringing.stop(np.array([i]), self.shift_time)

    def _step_dynamics(self, index: I, x0: F, v0: F, eff: F, t: float) -> None:
        """Decide which actuators a step snaps; start the others' ringing about their new equilibrium."""
        if index.size == 0:
            return
        c = self.is_coupler[index]
        if c.all():
            snapped, x_eq, w, zeta = self._plate_step(index, x0, v0, eff)
        elif not c.any():
            snapped, x_eq, w, zeta = self._comb_step(index, x0, v0, eff)
        else:
            n = len(index)
            snapped, x_eq, w, zeta = np.zeros(n, dtype=bool), np.zeros(n), np.zeros(n), np.zeros(n)
            for part, step in ((c, self._plate_step), (~c, self._comb_step)):
                snapped[part], x_eq[part], w[part], zeta[part] = step(index[part], x0[part], v0[part], eff[part])
        if snapped.any():
            self.pulled_in[index[snapped]] = True
            keep = ~snapped
            index, x0, v0, x_eq, w, zeta = index[keep], x0[keep], v0[keep], x_eq[keep], w[keep], zeta[keep]
        if index.size:
            self.ringing.restart(index, t, x0 - x_eq, v0, w, zeta)

    def _plate_step(self, index: I, x0: F, v0: F, eff: F) -> tuple[NDArray[np.bool_], F, F, F]:
        """Plates: the first overshoot may reach contact below V_PI (dynamic pull-in); above V_PI
        there is no equilibrium at all."""
        out = self.plate_steps.verdict(self.kind_position[index], x0, v0, eff)
        beyond = np.isnan(out.equilibrium_m)
        if beyond.any():
            return out.hit | beyond, np.where(beyond, 0.0, out.equilibrium_m), out.w_rad_per_s, out.zeta
        return out.hit, out.equilibrium_m, out.w_rad_per_s, out.zeta

    def _comb_step(self, index: I, x0: F, v0: F, eff: F) -> tuple[NDArray[np.bool_], F, F, F]:
        """Combs: linear (the force does not depend on x), so the snap test is on the swing's bound."""
        pos = self.kind_position[index]
        x_eq = self.comb_m_per_v2[index] * eff * eff
        w, zeta = self.comb_w[pos], self.comb_zeta[pos]
        amplitude = _linear_peak(x0 - x_eq, v0, w, zeta)
        return x_eq + amplitude >= self.contact_m[index], x_eq, w, zeta

    # ---------------------------------------------------------------- faults and optics

    def force_stuck(self, actuator_id: str, t: float) -> None:
        """Fault injection: the actuator stays where it is now, whatever it is driven with."""
        i = self.index[actuator_id]
        self.stuck_at[i] = self.displacement(t)[i]
        self.stuck[i] = True

    def crosstalk_displacement(self, t: float) -> F:
        """Extra displacement of every actuator caused by its neighbours' drive (quasi-static).

        Each free actuator sits where V_eq^2 = V^2 + sum f_j V_j^2 would put it; the part beyond
        its own equilibrium is the crosstalk. Pulled-in and stuck actuators do not move. A plate
        is held just below pull-in: crosstalk alone never snaps it (the guard's margin keeps
        real drives far from that).
        """
        dx = np.zeros(len(self.ids))
        if not self.crosstalk_shares.any():
            return dx
        eff = self.effective_volts(t)
        extra = equivalent_squared_volts(self.crosstalk_shares, eff) - eff * eff
        c, p = self.couplers, self.phases
        # Only actuators with a driven neighbour move; at rest this costs nothing.
        pushed = np.flatnonzero(extra[c] > 0.0)
        if pushed.size:
            top = 0.999 * self.plate.pull_in_volts[pushed]
            own = np.minimum(np.abs(eff[c[pushed]]), top)
            v_eq = np.minimum(np.sqrt(own * own + extra[c[pushed]]), top)
            both = self.plate.equilibrium(np.concatenate([v_eq, own]), np.concatenate([pushed, pushed]))
            dx[c[pushed]] = both[: pushed.size] - both[pushed.size :]
        if p.size:
            # A comb's displacement is linear in V^2, so the neighbours' share adds on its own.
            dx[p] = self.comb.force(np.sqrt(np.maximum(extra[p], 0.0))) / self.comb.spring
        dx[self.pulled_in | self.stuck] = 0.0
        return dx

    def optical_displacement(self, t: float) -> F:
        """Where every actuator really is: its own motion plus crosstalk."""
        return self.displacement(t) + self.crosstalk_displacement(t)

    def gate_optics(self, t: float) -> GateOptics:
        """Coupling, phases and arm loss of every gate at time ``t``."""
        x = self.optical_displacement(t)
        angle_all = np.zeros(len(self.ids))
        phase_all = np.zeros(len(self.ids))
        plate, d = self.plate, self.params.coupler
        gap = np.maximum(plate.optical_gap_rest - x[self.couplers], 0.0)
        coupling = optics.coupling_from_gap(gap, d.coupling_ref_per_m, d.coupling_ref_gap_m, d.coupling_decay_m)
        angle_all[self.couplers] = coupling * d.coupling_length_m
        phase_all[self.phases] = self.comb.phase(x[self.phases], self.params.laser.wavelength_m)
        kappa = optics.kappa_from_angle(angle_all[self.gate_coupler] + self.fabrication.splitting_angle_rad)
        actuated = phase_all[self.gate_phase]
        drift = self.drift.phase_rad(t)
        mesh = np.mod(self.fabrication.static_phase_rad + actuated + drift, 2.0 * np.pi)
        arm_loss = optics.arm_loss_db(actuated, self.params.phase.loss_db_per_rad)
        return GateOptics(kappa, actuated, drift, mesh, arm_loss)

    def optical_state(self, t: float) -> tuple[F, F]:
        """Power coupling and the phase the light sees (mod 2 pi) of every gate at time ``t``."""
        gates = self.gate_optics(t)
        return gates.kappa, gates.mesh_phase_rad

    def _propagate(self, gates: GateOptics) -> F:
        assert self.lattice is not None
        laser = self.params.laser
        field = np.zeros(self.lattice.layout.modes, dtype=complex)
        modes = list(laser.input_modes)
        field[modes] = np.sqrt(laser.power_w / len(modes))
        arm = optics.db_to_amplitude(gates.arm_loss_db)
        _, taps = self.lattice.propagate(field, gates.kappa, gates.mesh_phase_rad, self.gate_loss_amplitude, arm)
        return taps

    def tap_powers_w(self, t: float) -> F:
        """Optical power at each monitor tap, in monitor order."""
        if self.lattice is None:
            return np.zeros(len(self.monitor_ids))
        return self._propagate(self.gate_optics(t))

    def transfer_matrix(self, t: float) -> NDArray[np.complex128]:
        """The lattice's field transfer matrix at ``t`` (taps included); for tests and inspection."""
        if self.lattice is None:
            raise ValueError("the simulator section has no lattice")
        gates = self.gate_optics(t)
        arm = optics.db_to_amplitude(gates.arm_loss_db)
        return self.lattice.transfer_matrix(gates.kappa, gates.mesh_phase_rad, self.gate_loss_amplitude, arm)

    def truth(self, t: float) -> ChipTruth:
        gates = self.gate_optics(t)
        taps = self._propagate(gates) if self.lattice is not None else np.zeros(len(self.monitor_ids))
        return ChipTruth(
            time_s=t,
            actuator_ids=self.ids,
            terminal_volts=self.terminal_volts.copy(),
            effective_volts=self.effective_volts(t).copy(),
            displacement_m=self.optical_displacement(t),
            pulled_in=self.pulled_in.copy(),
            stuck=self.stuck.copy(),
            gate_ids=self.gate_ids,
            kappa=gates.kappa,
            phase_rad=gates.actuated_phase_rad,
            tap_power_w=taps,
            mesh_phase_rad=gates.mesh_phase_rad,
            static_phase_rad=self.fabrication.static_phase_rad.copy(),
            drift_phase_rad=gates.drift_phase_rad,
            splitting_angle_rad=self.fabrication.splitting_angle_rad.copy(),
            insertion_loss_db=self.gate_loss_db + gates.arm_loss_db,
        )


def _child_seeds(rng: np.random.Generator, count: int) -> list[np.random.SeedSequence]:
    """Independent seed sequences derived from ``rng``'s seed without drawing from its stream."""
    seed = rng.bit_generator.seed_seq
    if not isinstance(seed, np.random.SeedSequence):
        raise TypeError("the chip's generator must be seeded from a SeedSequence")
    return seed.spawn(count)


def _linear_peak(y0: F, v0: F, w: F, zeta: F) -> F:
    """Upper bound of the first overshoot above equilibrium: the initial energy amplitude
    sqrt(y0^2 + (v0/w)^2) (no damping credit; conservative)."""
    return np.asarray(np.sqrt(y0 * y0 + (v0 / w) ** 2))
