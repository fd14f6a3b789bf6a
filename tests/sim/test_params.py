"""The simulator section's imperfection keys: parsed with units, switched off by 0, refused when unusable."""

from __future__ import annotations

import math
from typing import Any

import pytest

from meshsim.params import ParamsError, parse_params


def test_imperfections_default_on_so_that_a_chip_needs_calibrating() -> None:
    """Without the keys, a chip has static phase errors over the full 2 pi, splitting errors,
    crosstalk, phase-dependent loss and drift."""
    params = parse_params({})
    assert params.spread.static_phase_span_rad == pytest.approx(2 * math.pi)
    assert params.spread.splitting_angle_rad > 0
    assert params.crosstalk.within_gate_fraction > 0 and params.crosstalk.adjacent_gate_fraction > 0
    assert params.phase.loss_db_per_rad > 0
    assert params.drift.random_walk_rad_per_sqrt_s > 0


def test_every_imperfection_switches_off_with_zero() -> None:
    """Each key set to 0 reads back as 0; temperature steps read as sorted (at_s, rad) pairs."""
    params = parse_params(
        {
            "spread": {"static_phase_span_rad": 0, "splitting_angle_rad": 0},
            "crosstalk": {"within_gate_fraction": 0, "adjacent_gate_fraction": 0},
            "phase": {"loss_db_per_rad": 0},
            "drift": {"random_walk_rad_per_sqrt_s": 0, "temperature_steps": [[600, -0.2], [300, 0.5]]},
        }
    )
    assert params.spread.static_phase_span_rad == 0 and params.spread.splitting_angle_rad == 0
    assert params.crosstalk.within_gate_fraction == 0 and params.crosstalk.adjacent_gate_fraction == 0
    assert params.phase.loss_db_per_rad == 0 and params.drift.random_walk_rad_per_sqrt_s == 0
    assert params.drift.temperature_steps == ((300.0, 0.5), (600.0, -0.2))


@pytest.mark.parametrize(
    ("raw", "message"),
    [
        (
            {"drift": {"random_walk_rad_per_sqrt_s": -0.1}},
            "simulator.drift.random_walk_rad_per_sqrt_s: expected a number >= 0",
        ),
        (
            {"drift": {"temperature_steps": [[300]]}},
            "simulator.drift.temperature_steps[0]: expected [at_s, rad], got [300]",
        ),
        (
            {"drift": {"temperature_steps": 5}},
            "simulator.drift.temperature_steps: expected a list of [at_s, rad] pairs, got 5",
        ),
        ({"drift": {"wander": 1}}, "simulator.drift: unknown key 'wander'"),
        (
            {"crosstalk": {"within_gate_fraction": 0.7}},
            "simulator.crosstalk: a neighbour's share of the drive must be at most 0.5",
        ),
        (
            {"crosstalk": {"adjacent_gate_fraction": -0.01}},
            "simulator.crosstalk.adjacent_gate_fraction: expected a number >= 0",
        ),
        (
            {"spread": {"static_phase_span_rad": 7.0}},
            "simulator.spread.static_phase_span_rad: expected 0 to 2 pi, got 7.0",
        ),
        (
            {"spread": {"splitting_angle_rad": float("nan")}},
            "simulator.spread.splitting_angle_rad: expected a number >= 0",
        ),
        ({"phase": {"loss_db_per_rad": -1}}, "simulator.phase.loss_db_per_rad: expected a number >= 0"),
        ({"drift": {"temperature_step_rad": "a lot"}}, "simulator.drift.temperature_step_rad: expected a number >= 0"),
        ({"spread": {"static_phase_span_rad": -1}}, "simulator.spread.static_phase_span_rad: expected a number >= 0"),
    ],
)
def test_unusable_imperfection_values_are_refused_with_their_key(raw: dict[str, Any], message: str) -> None:
    """A negative, out-of-range or malformed imperfection value is refused, naming its key."""
    with pytest.raises(ParamsError) as caught:
        parse_params(raw)
    assert str(caught.value).startswith(message)
