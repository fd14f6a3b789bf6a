"""The guard: hard limits, ramp plans within step and dwell limits, and the dynamic pull-in check."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from meshwarden.errors import LimitRefused
from meshwarden.guard import ChannelLimit, check_targets, plan_ramp, plate_peak_fraction, step_is_dynamically_safe

LSB = 60.0 / 65536


def limit(
    aid: str,
    kind: str = "coupler",
    hard: float = 40.0,
    step: float = 2.0,
    dwell: float = 0.002,
    pull_in: float = 50.0,
    margin: float = 0.15,
) -> ChannelLimit:
    return ChannelLimit(aid, kind, LSB, hard, step, dwell, pull_in, margin)


channel_limits = st.builds(
    lambda kind, hard, step, dwell: (kind, hard, step, dwell),
    st.sampled_from(["coupler", "phase"]),
    st.floats(5.0, 42.0),
    st.floats(0.05, 5.0),
    st.floats(0.0, 0.01),
)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(channel_limits, st.floats(0, 1), st.floats(0, 1)), min_size=1, max_size=6))
def test_any_plan_keeps_every_rule(channels: list) -> None:
    """For any channels, start and target within the limits: every step moves each channel by at
    most its step limit, stays within [0, hard limit], waits the dwell, and ends on the target."""
    limits, current, targets = {}, {}, {}
    for i, ((kind, hard, step, dwell), start_frac, target_frac) in enumerate(channels):
        aid = f"a{i}"
        limits[aid] = limit(aid, kind, hard, step, dwell, pull_in=60.0 if kind == "coupler" else 70.0)
        current[aid] = int(start_frac * limits[aid].hard_limit_code)
        targets[aid] = int(target_frac * limits[aid].hard_limit_code)
    plan = plan_ramp(limits, current, targets)
    previous = dict(current)
    for index, step in enumerate(plan.steps):
        for aid, code in step.codes.items():
            assert 0 <= code <= limits[aid].hard_limit_code
            assert abs(code - previous[aid]) <= limits[aid].step_limit_code
            assert step_is_dynamically_safe(limits[aid], previous[aid] * LSB, code * LSB)
        if index > 0:
            assert step.dwell_before_s >= max(limits[a].dwell_s for a in step.codes)
        previous.update(step.codes)
    assert all(previous[a] == t for a, t in targets.items())


def test_targets_above_the_hard_limit_are_refused_not_clamped() -> None:
    """Targets above the hard limit or below zero are refused, never clamped."""
    limits = {"c0": limit("c0", hard=40.0)}
    with pytest.raises(LimitRefused, match="above its hard limit 40 V"):
        check_targets(limits, {"c0": limits["c0"].hard_limit_code + 1})
    with pytest.raises(LimitRefused, match="negative"):
        check_targets(limits, {"c0": -1})


def test_undamped_dynamic_pull_in_threshold() -> None:
    """The guard's energy model snaps a step from rest at sqrt(27/32) V_PI = 0.91856 V_PI and
    not below; just under it the peak is near x = 0.48 g (shared/PHYSICS.md; Leus & Elata 2008,
    from memory)."""
    assert math.isinf(plate_peak_fraction(0.0, 0.9190 * 50, 50.0))
    peak = plate_peak_fraction(0.0, 0.9180 * 50, 50.0)
    assert peak == pytest.approx(0.483, abs=0.01)
    assert plate_peak_fraction(0.0, 0.5 * 50, 50.0) == pytest.approx(2 * 0.040205, rel=0.15)


def test_large_steps_near_the_limit_are_split_for_the_dynamic_check() -> None:
    """A comb drive at 40 V stepping by its 4 V step limit would overshoot past the snap
    displacement less the margin; the plan uses smaller steps there."""
    comb = limit("p0", "phase", hard=44.0, step=4.0, pull_in=55.0)
    assert not step_is_dynamically_safe(comb, 40.0, 44.0)
    plan = plan_ramp({"p0": comb}, {"p0": int(40.0 / LSB)}, {"p0": int(44.0 / LSB)})
    assert len(plan.steps) > 1


def test_no_plan_when_nothing_moves() -> None:
    """A request for the current codes plans no step at all."""
    assert plan_ramp({"c0": limit("c0")}, {"c0": 100}, {"c0": 100}).steps == ()


def test_hard_limit_never_exceeds_the_top_code() -> None:
    """A limit equal to full scale maps to the top code 2^N - 1, one LSB below full scale
    (Kester MT-001 convention), never to the non-existent code 2^N."""
    full = ChannelLimit("c0", "phase", LSB, 60.0, 2.0, 0.0, 1000.0, 0.0, 65535)
    assert full.hard_limit_code == 65535


@settings(max_examples=200, deadline=None)
@given(st.floats(1e-9, 4.0 / 27.0 - 1e-9))
def test_closed_form_equilibria_match_numpy_roots(a: float) -> None:
    """The guard's closed-form equilibria of a parallel plate, u (1 - u)^2 = a (Nathanson et al.
    1967 normalisation), are the two smallest roots numpy.roots finds for u^3 - 2u^2 + u - a
    (reference library), to 1e-9."""
    import numpy as np

    from meshwarden.guard import _equilibria

    reference = np.sort(np.real(np.roots([1.0, -2.0, 1.0, -a])))
    stable, saddle = _equilibria(a)
    assert stable == pytest.approx(float(reference[0]), abs=1e-9)
    assert saddle == pytest.approx(float(reference[1]), abs=1e-9)
