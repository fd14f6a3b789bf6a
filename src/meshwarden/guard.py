"""Safety limits and ramp plans. Pure: no I/O, no clock; everything in integer DAC codes.

Rules enforced here (docs/architecture.md, rules 1 and 2):

1. No target above the channel's hard limit min(board full scale, actuator limit,
   (1 - margin) x pull-in). A request above it is refused, never clamped.
2. A change larger than the step limit becomes a sequence of steps, none larger than the limit,
   with the actuator's dwell between them. Working in codes makes the bound exact: step k of N
   goes to c0 + floor(k D / N) (toward the target), so no two consecutive codes differ by more
   than ceil(D / N) <= the step limit in codes.
3. Each step is also checked dynamically, assuming the actuator starts at rest and nothing damps
   the step (the worst case): its first overshoot must stay below the instability displacement
   less the margin. Parallel plates (couplers): energy conservation in u = x / g,
   u^2 / 2 - a / (1 - u) = const with a = (4/27)(V / V_PI)^2, finds the peak; it snaps when the
   energy carries it past the unstable equilibrium (undamped threshold sqrt(27/32) V_PI, shared/
   PHYSICS.md). Comb drives: linear, x ~ V^2, the undamped peak is 2 x2 - x1. When a step fails,
   the plan is made of more, smaller steps.

The plan's dwell between steps must cover the actuator's ringdown; the configuration sets it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meshwarden.errors import LimitRefused

MAX_STEPS = 20000


@dataclass(frozen=True)
class ChannelLimit:
    """The guard's view of one actuator's output channel, in codes of its board's DAC."""

    actuator_id: str
    kind: str  # "coupler" (parallel plate) or "phase" (comb drive)
    lsb_volts: float
    hard_limit_volts: float
    step_limit_volts: float
    dwell_s: float
    pull_in_volts: float
    margin: float
    max_code: int = 65535  # the DAC's top code, one LSB below full scale

    @property
    def hard_limit_code(self) -> int:
        return min(math.floor(self.hard_limit_volts / self.lsb_volts + 1e-9), self.max_code)

    @property
    def step_limit_code(self) -> int:
        return max(1, math.floor(self.step_limit_volts / self.lsb_volts + 1e-9))


@dataclass(frozen=True)
class Step:
    """Codes to write at once, after waiting ``dwell_before_s`` since the previous step."""

    codes: dict[str, int]
    dwell_before_s: float


@dataclass(frozen=True)
class RampPlan:
    steps: tuple[Step, ...]
    targets: dict[str, int]


def check_targets(limits: dict[str, ChannelLimit], targets: dict[str, int]) -> None:
    """Refuse any target code below zero or above its channel's hard limit."""
    for actuator_id, code in targets.items():
        limit = limits[actuator_id]
        if code < 0:
            raise LimitRefused(
                f"{actuator_id}: {code * limit.lsb_volts:.6g} V is negative",
                actuator=actuator_id,
                volts=code * limit.lsb_volts,
            )
        if code > limit.hard_limit_code:
            raise LimitRefused(
                f"{actuator_id}: {code * limit.lsb_volts:.6g} V is above its hard limit {limit.hard_limit_volts:.6g} V",
                actuator=actuator_id,
                volts=code * limit.lsb_volts,
                limit_v=limit.hard_limit_volts,
            )


def plate_peak_fraction(volts_from: float, volts_to: float, pull_in_volts: float) -> float:
    """Undamped first peak u = x / g of a parallel plate stepped from rest at ``volts_from``;
    ``inf`` when it snaps."""
    r1, r2 = abs(volts_from) / pull_in_volts, abs(volts_to) / pull_in_volts
    if r2 >= 1.0 or r1 >= 1.0:
        return math.inf
    u1 = _stable_root(r1)
    if r2 <= r1:
        return u1
    a = 4.0 / 27.0 * r2 * r2
    stable, saddle = _equilibria(a)  # u (1 - u)^2 = a: the stable root and the saddle

    def level(u: float) -> float:
        return 0.5 * u * u - a / (1.0 - u) - (0.5 * u1 * u1 - a / (1.0 - u1))

    if level(saddle) <= 0.0:
        return math.inf  # the energy carries it over the unstable equilibrium: dynamic pull-in
    low, high = stable, saddle
    for _ in range(80):
        mid = 0.5 * (low + high)
        if level(mid) < 0.0:
            low = mid
        else:
            high = mid
    return high


def _equilibria(a: float) -> tuple[float, float]:
    """The two roots of u (1 - u)^2 = a in [0, 1] for 0 <= a <= 4/27: stable, then saddle.

    With u = 2/3 + t the cubic becomes t^3 - t/3 + (2/27 - a) = 0, three real roots
    t_k = (2/3) cos(theta/3 - 2 pi k/3) with cos(theta) = (27 a - 2) / 2 (the trigonometric
    solution of a depressed cubic); k = 2 is the smallest root, k = 1 the middle one."""
    arg = min(max((27.0 * a - 2.0) / 2.0, -1.0), 1.0)
    third = math.acos(arg) / 3.0
    stable = 2.0 / 3.0 + 2.0 / 3.0 * math.cos(third - 4.0 * math.pi / 3.0)
    saddle = 2.0 / 3.0 + 2.0 / 3.0 * math.cos(third - 2.0 * math.pi / 3.0)
    return stable, saddle


def _stable_root(r: float) -> float:
    return _equilibria(4.0 / 27.0 * r * r)[0]


def step_is_dynamically_safe(limit: ChannelLimit, volts_from: float, volts_to: float) -> bool:
    """True when the undamped overshoot of this step stays below the instability less the margin."""
    if volts_to <= volts_from:
        return True
    if limit.kind == "coupler":
        return plate_peak_fraction(volts_from, volts_to, limit.pull_in_volts) <= (1.0 - limit.margin) / 3.0
    # comb drive: x ~ V^2, undamped peak 2 x2 - x1, snap displacement ~ V_snap^2
    peak = 2.0 * volts_to**2 - volts_from**2
    return peak <= ((1.0 - limit.margin) * limit.pull_in_volts) ** 2


def plan_ramp(limits: dict[str, ChannelLimit], current: dict[str, int], targets: dict[str, int]) -> RampPlan:
    """Steps from ``current`` to ``targets`` that keep every rule; refuses what it cannot plan."""
    check_targets(limits, targets)
    moving = {a: t for a, t in targets.items() if current.get(a, 0) != t}
    if not moving:
        return RampPlan((), dict(targets))
    n = max(math.ceil(abs(t - current.get(a, 0)) / limits[a].step_limit_code) for a, t in moving.items())
    while n <= MAX_STEPS:
        steps = _uniform_steps(limits, current, moving, n)
        if steps is not None:
            return RampPlan(steps, dict(targets))
        n *= 2
    raise LimitRefused("cannot plan a dynamically safe ramp for this change", actuators=sorted(moving))


def _uniform_steps(
    limits: dict[str, ChannelLimit], current: dict[str, int], moving: dict[str, int], n: int
) -> tuple[Step, ...] | None:
    dwell = max(limits[a].dwell_s for a in moving)
    steps = []
    previous = {a: current.get(a, 0) for a in moving}
    for k in range(1, n + 1):
        codes = {}
        for a, target in moving.items():
            start = current.get(a, 0)
            delta = target - start
            offset = (abs(delta) * k) // n
            code = start + offset if delta > 0 else start - offset
            limit = limits[a]
            if not step_is_dynamically_safe(limit, previous[a] * limit.lsb_volts, code * limit.lsb_volts):
                return None
            codes[a] = code
        steps.append(Step(codes, 0.0 if k == 1 else dwell))
        previous = codes
    return tuple(steps)
