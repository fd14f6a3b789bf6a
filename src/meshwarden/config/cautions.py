"""Cautions: things a valid configuration allows but an engineer must hear about.

A caution is not an error (the configuration loads), but each one names a way the rack can
surprise the person beside it: outputs that stay at high voltage when the daemon is gone, a limit
that walks close to pull-in, a calibration that was computed rather than measured. `check-config`
prints them after its summary and `meshwarden serve` prints them at start, so they are seen where
the user is.
"""

from __future__ import annotations

from dataclasses import dataclass

from meshwarden.calibration import load_calibration
from meshwarden.config.model import NEAR_PULL_IN_FRACTION, Config
from meshwarden.errors import CalibrationError


@dataclass(frozen=True)
class Caution:
    """One caution; ``loud`` ones are printed in capitals (outputs that can stay live unattended)."""

    message: str
    loud: bool = False

    def __str__(self) -> str:
        return f"WARNING: {self.message}" if self.loud else f"caution: {self.message}"


def _ids(ids: list[str], shown: int = 6) -> str:
    return ", ".join(ids[:shown]) + (f" and {len(ids) - shown} more" if len(ids) > shown else "")


def cautions(config: Config) -> list[Caution]:
    """Every caution for ``config``, most serious first."""
    out: list[Caution] = []
    for board in config.rack.boards:
        if board.watchdog.action == "hold":
            out.append(
                Caution(
                    f"board '{board.id}' watchdog action is 'hold': if the daemon stops or its link is lost, "
                    "the outputs stay at their voltage indefinitely and nothing ramps them down "
                    "(use ramp_to_zero unless you must keep them; switch the rack off before touching probes)",
                    loud=True,
                )
            )
    override = config.safety.margin_override
    if override is not None:
        out.append(
            Caution(
                f"pull-in margin {config.safety.pull_in_margin:g} is below the usual minimum by override: "
                f"measured pull-in: {override.measured_pull_in}; reason: {override.reason}",
                loud=True,
            )
        )
    near = [a.id for a in config.chip.actuators if a.limit_volts >= (1.0 - NEAR_PULL_IN_FRACTION) * a.pull_in_volts]
    if near:
        out.append(
            Caution(
                f"limits within {NEAR_PULL_IN_FRACTION:.0%} of pull-in: {_ids(near)}; "
                "pull-in shifts with dielectric charging and temperature",
                loud=True,
            )
        )
    nominal, short = [], []
    for act in config.chip.actuators:
        try:
            table = load_calibration(act.calibration)
        except CalibrationError:
            continue  # reported by the checks
        if table.origin == "design-nominal":
            nominal.append(act.id)
        if table.volts[-1] < config.hard_limit_volts(act) - 1e-9:
            short.append(f"{act.id} ({table.volts[-1]:g} V < {config.hard_limit_volts(act):g} V)")
    if short:
        out.append(
            Caution(
                f"calibration tables ending below the actuator's limit: {_ids(short)}; "
                "logical values past a table's end cannot be set (volts still can, up to the limit)"
            )
        )
    if nominal:
        out.append(
            Caution(
                f"{len(nominal)} of {len(config.chip.actuators)} actuators use design-nominal calibration "
                f"({_ids(nominal, 3)}): computed from a model, not measured - not for a real chip"
            )
        )
    return out
