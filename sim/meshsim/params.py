"""The simulator's physical parameters, read from the ``simulator`` section and converted to SI.

Every key names its unit. Missing keys take the documented defaults below, which describe our
own demo chip: a silicon photonic lattice whose tunable couplers are parallel-plate actuators
(a dielectric-coated electrode under a moving plate) and whose phase shifters are comb drives
that move a dielectric beam toward the waveguide. See docs/simulator.md.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace
from typing import Any

PERSONALITIES = ("reference", "scpi")


class ParamsError(ValueError):
    """A simulator section with an unknown key or an unusable value."""


@dataclass(frozen=True)
class CouplerDevice:
    """A tunable coupler on a parallel-plate electrostatic actuator."""

    spring_n_per_m: float = 27.7
    air_gap_m: float = 3.0e-6
    dielectric_m: float = 100e-9
    dielectric_eps_r: float = 7.5
    area_m2: float = 1.0e-8
    resonance_hz: float = 500e3
    quality_factor: float = 50.0
    optical_gap_rest_m: float = 700e-9
    coupling_length_m: float = 20e-6
    coupling_ref_per_m: float = math.pi / 2 / 20e-6
    coupling_ref_gap_m: float = 330e-9
    coupling_decay_m: float = 113e-9
    loss_db: float = 0.15
    charging_fraction: float = 0.02
    charging_time_s: float = 300.0
    stiction_probability: float = 0.3


@dataclass(frozen=True)
class PhaseDevice:
    """A phase shifter: a comb drive moving a dielectric beam toward the waveguide."""

    fingers: float = 100.0
    thickness_m: float = 10e-6
    finger_gap_m: float = 2e-6
    spring_n_per_m: float = 7.0
    resonance_hz: float = 500e3
    quality_factor: float = 200.0
    lateral_snap_volts: float = 55.0
    optical_gap_rest_m: float = 1.3e-6
    index_shift_contact: float = 0.031
    index_decay_m: float = 250e-9
    length_m: float = 200e-6
    loss_db: float = 0.2
    # Extra loss of the phase arm per radian of actuated phase: the nearer the beam, the more of
    # the mode it scatters (a stand-in; a few hundredths of a dB over 2 pi).
    loss_db_per_rad: float = 0.006
    charging_fraction: float = 0.005
    charging_time_s: float = 600.0
    stiction_probability: float = 0.3


@dataclass(frozen=True)
class Spread:
    """Fabrication spread, drawn once per chip from the seed.

    The ``*_rel`` keys are relative standard deviations per actuator. ``static_phase_span_rad``:
    each gate's phase arm carries a path-length error uniform in [0, span) (2 pi: the arm's phase
    at rest is unknown). ``splitting_angle_rad``: standard deviation of an additive error of each
    coupler's splitting angle, so kappa at 0 V is sin^2(C(g_rest) L + error). 0 turns either off.
    """

    spring_rel: float = 0.03
    gap_rel: float = 0.02
    optical_gap_rel: float = 0.01
    static_phase_span_rad: float = 2.0 * math.pi
    splitting_angle_rad: float = 0.08


@dataclass(frozen=True)
class Crosstalk:
    """Electrostatic crosstalk: the fraction of a neighbouring electrode's V^2 that acts on an
    actuator as if it were its own drive (a stand-in for fringing fields; 0 turns it off).

    ``within_gate_fraction`` couples a gate's coupler and phase shifter; ``adjacent_gate_fraction``
    couples like actuators of gates side by side in one lattice column.
    """

    within_gate_fraction: float = 0.02
    adjacent_gate_fraction: float = 0.01


@dataclass(frozen=True)
class Drift:
    """Slow phase drift of every gate's phase arm, a function of simulated time (seeded).

    ``random_walk_rad_per_sqrt_s``: each arm's phase is an independent Wiener process with
    variance D^2 t. ``temperature_steps``: (at_s, rad) pairs, each moving every arm by the same
    amount from that time on. ``temperature_step_interval_s`` > 0 adds random steps at that mean
    interval (a Poisson process), each of normal size with standard deviation
    ``temperature_step_rad``. 0 turns each part off.
    """

    random_walk_rad_per_sqrt_s: float = 0.02
    temperature_steps: tuple[tuple[float, float], ...] = ()
    temperature_step_interval_s: float = 0.0
    temperature_step_rad: float = 0.3


@dataclass(frozen=True)
class Detectors:
    quantum_efficiency: float = 0.72
    dark_current_a: float = 5e-9
    temperature_k: float = 300.0
    adc_full_scale_volts: float = 2.5


@dataclass(frozen=True)
class Laser:
    wavelength_m: float = 1550e-9
    power_w: float = 1e-3
    input_modes: tuple[int, ...] = (0,)


@dataclass(frozen=True)
class BoardFirmware:
    model: str = "MW-HVD64-SIM"
    firmware: tuple[int, int, int] = (1, 0, 0)
    watchdog_ramp_volts_per_s: float = 20.0
    sense_noise_volts: float = 0.002


@dataclass(frozen=True)
class LatticeSpec:
    modes: int
    columns: tuple[tuple[tuple[str, int], ...], ...]
    taps: tuple[tuple[str, int, int], ...]
    tap_fraction: float = 0.01
    transition_loss_db: float = 0.05


@dataclass(frozen=True)
class SimParams:
    seed: int
    coupler: CouplerDevice
    phase: PhaseDevice
    spread: Spread
    detectors: Detectors
    laser: Laser
    board: BoardFirmware
    lattice: LatticeSpec | None
    crosstalk: Crosstalk = Crosstalk()
    drift: Drift = Drift()
    personality: str = "reference"  # what every board speaks: reference | scpi (meshsim.scpi)


# key in YAML -> (field name, factor to SI)
_UNIT_SUFFIXES = {
    "_per_um": 1e6,
    "_um": 1e-6,
    "_nm": 1e-9,
    "_um2": 1e-12,
    "_khz": 1e3,
    "_mw": 1e-3,
    "_na": 1e-9,
    "_mv": 1e-3,
}


def _section(cls: type[Any], raw: Any, where: str) -> Any:
    """Build ``cls`` from a YAML mapping whose keys carry units (``air_gap_um`` -> ``air_gap_m``)."""
    if raw is None:
        return cls()
    if not isinstance(raw, dict):
        raise ParamsError(f"simulator.{where}: expected a mapping")
    names = {f.name for f in fields(cls)}
    values: dict[str, Any] = {}
    for key, value in raw.items():
        name, factor = key, 1.0
        for suffix, f in _UNIT_SUFFIXES.items():
            if key.endswith(suffix):
                stem = key[: -len(suffix)]
                si = {
                    "_um": "_m",
                    "_nm": "_m",
                    "_um2": "_m2",
                    "_khz": "_hz",
                    "_mw": "_w",
                    "_na": "_a",
                    "_per_um": "_per_m",
                    "_mv": "_volts",
                }[suffix]
                name, factor = stem + si, f
                break
        if name not in names:
            raise ParamsError(f"simulator.{where}: unknown key '{key}'")
        if isinstance(value, list):
            values[name] = tuple(value)
        elif isinstance(value, bool) or not isinstance(value, int | float | str):
            raise ParamsError(f"simulator.{where}.{key}: expected a number")
        else:
            values[name] = value * factor if isinstance(value, int | float) else value
    return cls(**values)


def _lattice(raw: Any) -> LatticeSpec | None:
    if raw is None:
        return None
    try:
        columns = tuple(tuple((str(g), int(m)) for g, m in col.items()) for col in raw["columns"])
        taps = tuple((str(mid), int(pos[0]), int(pos[1])) for mid, pos in raw["taps"].items())
        return LatticeSpec(
            modes=int(raw["modes"]),
            columns=columns,
            taps=taps,
            tap_fraction=float(raw.get("tap_fraction", 0.01)),
            transition_loss_db=float(raw.get("transition_loss_db", 0.05)),
        )
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise ParamsError(f"simulator.lattice: expected modes, columns and taps ({exc!r})") from None


def _drift(raw: Any) -> Drift:
    """The drift group; ``temperature_steps`` is a list of [at_s, rad] pairs."""
    steps_raw = raw.get("temperature_steps") if isinstance(raw, dict) else None
    rest = {k: v for k, v in raw.items() if k != "temperature_steps"} if isinstance(raw, dict) else raw
    drift: Drift = _section(Drift, rest, "drift")
    if steps_raw is None:
        return drift
    if not isinstance(steps_raw, list):
        raise ParamsError(f"simulator.drift.temperature_steps: expected a list of [at_s, rad] pairs, got {steps_raw!r}")
    steps: list[tuple[float, float]] = []
    for n, pair in enumerate(steps_raw):
        if (
            not isinstance(pair, list | tuple)
            or len(pair) != 2
            or not all(isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) for v in pair)
        ):
            raise ParamsError(f"simulator.drift.temperature_steps[{n}]: expected [at_s, rad], got {pair!r}")
        steps.append((float(pair[0]), float(pair[1])))
    return replace(drift, temperature_steps=tuple(sorted(steps)))


def _non_negative(group: str, values: dict[str, Any]) -> None:
    for key, value in values.items():
        if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0.0):
            raise ParamsError(f"simulator.{group}.{key}: expected a number >= 0, got {value!r}")


def _check_imperfections(params: SimParams) -> None:
    """The chip's imperfections must be usable numbers; 0 switches each one off."""
    spread, xt, drift = params.spread, params.crosstalk, params.drift
    _non_negative("spread", {"splitting_angle_rad": spread.splitting_angle_rad})
    _non_negative("spread", {"static_phase_span_rad": spread.static_phase_span_rad})
    if spread.static_phase_span_rad > 2.0 * math.pi + 1e-12:
        raise ParamsError(
            f"simulator.spread.static_phase_span_rad: expected 0 to 2 pi, got {spread.static_phase_span_rad!r}"
        )
    _non_negative(
        "crosstalk",
        {"within_gate_fraction": xt.within_gate_fraction, "adjacent_gate_fraction": xt.adjacent_gate_fraction},
    )
    if xt.within_gate_fraction > 0.5 or xt.adjacent_gate_fraction > 0.5:
        raise ParamsError("simulator.crosstalk: a neighbour's share of the drive must be at most 0.5")
    _non_negative(
        "drift",
        {
            "random_walk_rad_per_sqrt_s": drift.random_walk_rad_per_sqrt_s,
            "temperature_step_interval_s": drift.temperature_step_interval_s,
            "temperature_step_rad": drift.temperature_step_rad,
        },
    )
    _non_negative("phase", {"loss_db_per_rad": params.phase.loss_db_per_rad})


def parse_params(raw: dict[str, Any], seed: int | None = None) -> SimParams:
    """The simulator section as :class:`SimParams`; ``seed`` overrides the section's seed."""
    known = {
        "seed",
        "coupler",
        "phase",
        "spread",
        "detectors",
        "laser",
        "board",
        "lattice",
        "crosstalk",
        "drift",
        "personality",
    }
    personality = raw.get("personality", "reference")
    if personality not in PERSONALITIES:
        raise ParamsError(f"simulator.personality: expected one of {', '.join(PERSONALITIES)}, got {personality!r}")
    for key in raw:
        if key not in known:
            raise ParamsError(f"simulator: unknown key '{key}' (known: {', '.join(sorted(known))})")
    params = SimParams(
        seed=int(seed if seed is not None else raw.get("seed", 0)),
        coupler=_section(CouplerDevice, raw.get("coupler"), "coupler"),
        phase=_section(PhaseDevice, raw.get("phase"), "phase"),
        spread=_section(Spread, raw.get("spread"), "spread"),
        detectors=_section(Detectors, raw.get("detectors"), "detectors"),
        laser=_section(Laser, raw.get("laser"), "laser"),
        board=_section(BoardFirmware, raw.get("board"), "board"),
        lattice=_lattice(raw.get("lattice")),
        crosstalk=_section(Crosstalk, raw.get("crosstalk"), "crosstalk"),
        drift=_drift(raw.get("drift")),
        personality=str(personality),
    )
    _check_imperfections(params)
    return params
