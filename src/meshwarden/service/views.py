"""What `get` answers: the controller's snapshot, plus the gates and each actuator's journaled target.

One rule for values (docs/bus.md): an actuator's ``value`` is what its output means *now* - it
is ``null`` whenever the output was moved without a logical meaning (disarm, emergency stop, a
write in volts, a reset board). ``target`` is separate: the last target the journal holds for the
actuator, which is what `restore` ramps a reset board back to.
"""

from __future__ import annotations

from typing import Any

from meshwarden.controller import Controller


def get_view(controller: Controller) -> dict[str, Any]:
    """The `get` reply: snapshot + ``gates`` {id: {coupler, phase}} + per-actuator
    ``calibration_version``, ``reachable`` [lowest, highest] logical value its table in force
    reaches within the limit (kappa, or phase in rad) and ``target`` {volts, value,
    calibration_version} (or null)."""
    snap = controller.snapshot()
    targets = controller.journal.latest_targets()
    for aid, entry in snap["actuators"].items():
        entry["calibration_version"] = controller.actuators[aid].calibration_version
        entry["reachable"] = list(controller.actuators[aid].map.reachable())
        record = targets.get(aid)
        entry["target"] = (
            None
            if record is None
            else {"volts": record.volts, "value": record.value, "calibration_version": record.calibration_version}
        )
    snap["gates"] = {gid: {"coupler": g.coupler, "phase": g.phase} for gid, g in controller.gates.items()}
    return snap
