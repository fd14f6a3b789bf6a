"""Logical value <-> volts <-> codes: round trips, the 2 pi choice, refusals."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.interpolate import PchipInterpolator

from meshwarden.calibration import CalibrationTable
from meshwarden.errors import UnreachableRefused
from meshwarden.mapping import ActuatorMap, code_to_volts, volts_to_code

VOLTS = tuple(float(v) for v in np.arange(0.0, 44.5, 0.5))
PHASE = tuple(float(7.0 * (v / 44.0) ** 3 + 1e-4 * v) for v in VOLTS)  # monotone, 0 .. ~7 rad
KAPPA = tuple(float(0.0035 + 0.99 * (v / 44.0) ** 4 + 1e-5 * v) for v in VOLTS)


def phase_map(limit: float = 44.0) -> ActuatorMap:
    return ActuatorMap("p0", "phase", CalibrationTable("p0", "phase", "t1", "measured", VOLTS, PHASE), limit)


def coupler_map(limit: float = 40.0) -> ActuatorMap:
    return ActuatorMap("c0", "coupler", CalibrationTable("c0", "coupler", "t1", "measured", VOLTS, KAPPA), limit)


def test_dac_convention_check_values() -> None:
    """LSB = FS / 2^N: 16 bits, 60 V -> 0.9155 mV; 30 V is code 32768 (Kester, Analog Devices MT-001)."""
    assert code_to_volts(1, 60.0, 16) == pytest.approx(0.9155e-3, rel=1e-4)
    assert volts_to_code(30.0, 60.0, 16) == 32768
    assert volts_to_code(code_to_volts(12345, 60.0, 16), 60.0, 16) == 12345


def test_interpolant_passes_through_the_table_and_is_scipys_pchip() -> None:
    """The curve is scipy's PCHIP of the table (Fritsch & Carlson monotone cubic)."""
    amap = phase_map()
    reference = PchipInterpolator(np.array(VOLTS), np.array(PHASE))
    for v in (0.0, 3.3, 17.25, 40.0):
        assert amap.value_at(v) == pytest.approx(float(reference(v)), abs=1e-15)
    assert all(amap.value_at(v) == pytest.approx(p, abs=1e-15) for v, p in zip(VOLTS, PHASE, strict=True))


@given(st.floats(min_value=0.01, max_value=2 * math.pi - 0.01))
def test_phase_round_trip_within_quantisation(phase: float) -> None:
    """value -> volts -> code -> volts -> value comes back within the slope times half an LSB."""
    amap = phase_map()
    volts = amap.volts_for(phase)
    code = volts_to_code(volts, 60.0, 16)
    back = amap.value_at(code_to_volts(code, 60.0, 16))
    slope = (amap.value_at(min(volts + 0.01, 44.0)) - amap.value_at(max(volts - 0.01, 0.0))) / 0.02
    assert abs(back - phase) <= slope * 0.5 * code_to_volts(1, 60.0, 16) * 1.01 + 1e-12


@given(st.floats(min_value=0.01, max_value=2 * math.pi - 0.01), st.integers(min_value=-3, max_value=3))
def test_phase_is_taken_modulo_two_pi_at_the_lowest_voltage(phase: float, turns: int) -> None:
    """phi + 2 pi k maps to the same volts as phi, the lowest-voltage solution."""
    amap = phase_map()
    volts = amap.volts_for(phase)
    assert amap.volts_for(phase + 2 * math.pi * turns) == pytest.approx(volts, abs=1e-9)
    assert amap.value_at(volts) == pytest.approx(phase, abs=1e-9)
    low, _ = amap.reachable()
    assert phase - 2 * math.pi < low  # no lower branch of the same phase exists on the curve


def test_coupler_unreachable_value_is_refused_with_the_range() -> None:
    """A coupling outside what the calibration reaches within the limit is refused, with the reachable range."""
    amap = coupler_map(limit=40.0)
    low, high = amap.reachable()
    with pytest.raises(UnreachableRefused) as err:
        amap.volts_for(0.99)
    assert f"reaches {low:.6g} to {high:.6g}" in err.value.message
    assert err.value.details["reachable"] == [low, high]
    with pytest.raises(UnreachableRefused):
        amap.volts_for(0.001)
    with pytest.raises(UnreachableRefused):
        amap.volts_for(float("nan"))


def test_hard_limit_cuts_the_reachable_range() -> None:
    """Within a 20 V limit the phase shifter reaches less than 2 pi: large phases are refused."""
    amap = phase_map(limit=20.0)
    assert amap.top_volts == 20.0
    with pytest.raises(UnreachableRefused, match="within its 20 V limit"):
        amap.volts_for(math.pi)


@given(st.floats(min_value=0.001, max_value=2 * math.pi - 0.001))
def test_inverse_agrees_with_a_root_finder_on_scipys_pchip(phase: float) -> None:
    """volts_for solves the same curve scipy's PchipInterpolator draws: scipy.optimize.brentq on
    it (reference computation) finds the same volts to 1e-9 V."""
    from scipy.optimize import brentq

    amap = phase_map()
    reference = PchipInterpolator(np.array(VOLTS), np.array(PHASE))
    expected = brentq(lambda v: float(reference(v)) - phase, 0.0, 44.0, xtol=1e-13)
    assert amap.volts_for(phase) == pytest.approx(expected, abs=1e-9)
