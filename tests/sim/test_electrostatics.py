"""Electrostatic actuator physics against published formulas and check values (shared/PHYSICS.md)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from meshsim.devices import plate_arrays
from meshsim.params import CouplerDevice
from meshsim.physics import electrostatics as es
from tests.sim.helpers import small_rack

K, AREA, GAP = 1.0, 1e-8, 2e-6


def test_parallel_plate_force_check_value() -> None:
    """F = eps0 A V^2 / (2 (g0 - x)^2); k=1 N/m, A=1e-8 m^2, g0=2 um, V=5 V, x=0 -> 2.7669e-7 N.
    Source: Senturia, Microsystem Design, Kluwer 2001, ch. 6."""
    assert float(es.parallel_plate_force(5.0, AREA, GAP)) == pytest.approx(2.7669e-7, rel=1e-4)


def test_pull_in_voltage_check_value() -> None:
    """V_PI = sqrt(8 k g0^3 / (27 eps0 A)) -> 5.17409 V for the same parameters.
    Source: Nathanson et al., IEEE Trans. Electron Devices 14:117 (1967)."""
    assert float(es.pull_in_volts(K, GAP, AREA)) == pytest.approx(5.17409, rel=1e-5)


@pytest.mark.parametrize(("ratio", "u"), [(0.5, 0.040205), (0.9, 0.177292), (1.0, 1.0 / 3.0)])
def test_equilibrium_check_values(ratio: float, u: float) -> None:
    """u (1-u)^2 = (4/27)(V/V_PI)^2, smallest root: 0.5 -> 0.040205, 0.9 -> 0.177292, 1.0 -> 1/3.
    Source: derived from Nathanson 1967 (shared/PHYSICS.md check values)."""
    assert float(es.equilibrium_fraction(ratio)) == pytest.approx(u, abs=2e-6)


@pytest.mark.parametrize("volts", [0.5, 2.0, 4.0, 5.0, 5.17])
def test_equilibrium_matches_a_root_found_by_scipy(volts: float) -> None:
    """Below pull-in the closed-form equilibrium is the force balance k x = F(V, x) solved by
    scipy.optimize.brentq on [0, g0/3]."""
    v_pi = float(es.pull_in_volts(K, GAP, AREA))

    def balance(x: float) -> float:
        return K * x - float(es.parallel_plate_force(volts, AREA, GAP, x))

    root = brentq(balance, 0.0, GAP / 3.0, xtol=1e-18)
    assert float(es.equilibrium_fraction(volts / v_pi)) * GAP == pytest.approx(root, rel=1e-6)


def test_no_equilibrium_above_pull_in() -> None:
    """Above V_PI there is no stable root in [0, g0/3]."""
    assert np.isnan(es.equilibrium_fraction(1.001))


def test_comb_drive_force_check_value_and_square_law() -> None:
    """F = n eps0 t V^2 / g: n=100, t=10 um, g=2 um, V=10 V -> 4.4271e-7 N; x(2V)/x(V) = 4.
    Source: Tang, Nguyen, Howe, Sens. Actuators 20:25 (1989)."""
    assert float(es.comb_force(10.0, 100, 10e-6, 2e-6)) == pytest.approx(4.4271e-7, rel=1e-4)
    assert float(es.comb_force(20.0, 100, 10e-6, 2e-6) / es.comb_force(10.0, 100, 10e-6, 2e-6)) == pytest.approx(4.0)


def test_dielectric_charging_shift_check_value() -> None:
    """V_shift = sigma t_d / (eps0 eps_r): 1e-4 C/m^2, 100 nm, eps_r 7.5 -> 0.15059 V.
    Source: Wibbeler et al., Sens. Actuators A 71:74 (1998) (formula from memory)."""
    assert float(es.charging_shift_volts(1e-4, 100e-9, 7.5)) == pytest.approx(0.15059, rel=1e-4)


def test_pull_out_voltage_is_the_contact_force_balance() -> None:
    """V_PO = sqrt(2 k g0 d^2 / (eps0 A)) balances spring k g0 against the plate force at contact.
    Source: Rebeiz, RF MEMS, Wiley 2003 (formula from memory); checked here by the force balance."""
    k, g0, d, a = 27.7, 3e-6, 100e-9 / 7.5, 1e-8
    v_po = float(es.pull_out_volts(k, g0, d, a))
    assert float(es.parallel_plate_force(v_po, a, g0 + d, g0)) == pytest.approx(k * g0, rel=1e-9)
    assert v_po < float(es.pull_in_volts(k, g0 + d, a))


def _sweep(rack_volts: list[float]) -> list[tuple[float, bool, float]]:
    """Drive coupler c0 of a small rack through ``rack_volts`` slowly (critically damped, Q = 0.5);
    return (volts, pulled in, displacement)."""
    from dataclasses import replace

    rack, clock = small_rack(coupler=replace(CouplerDevice(), quality_factor=0.5, stiction_probability=0.0))
    out = []
    for v in rack_volts:
        clock.advance(0.01)
        rack.chip.apply_volts(np.array([0]), np.array([v]), clock.now())
        truth = rack.truth()
        out.append((v, bool(truth.pulled_in[0]), float(truth.displacement_m[0])))
    return out


def test_static_pull_in_happens_at_v_pi_and_one_third_of_the_gap() -> None:
    """A slow upward sweep snaps within 0.5 % of V_PI from the formula, after reaching about g/3.
    Source: Nathanson et al. 1967 (x_PI = g0/3, V_PI formula). The last stable point of a sweep in
    0.1 % steps sits at 0.999 V_PI, where the equilibrium is still sqrt(8/27 x 0.001) = 1.7 % of
    the gap short of g/3 (the curve is flat at its top), hence the 6 % tolerance on x."""
    plate = plate_arrays(CouplerDevice(), 1)
    v_pi = float(plate.pull_in_volts[0])
    volts = list(np.linspace(0.0, 0.9 * v_pi, 10)) + list(np.arange(0.9 * v_pi, 1.02 * v_pi, 0.001 * v_pi))
    sweep = _sweep(volts)
    first = next(i for i, (_, pulled, _) in enumerate(sweep) if pulled)
    assert sweep[first][0] == pytest.approx(v_pi, rel=0.005)
    last_free_x = sweep[first - 1][2]
    assert last_free_x / float(plate.electrical_gap[0]) == pytest.approx(1.0 / 3.0, rel=0.06)


def test_hysteresis_releases_below_pull_in_at_pull_out() -> None:
    """After pull-in the plate stays down while the voltage falls below V_PI, and springs back
    only below the pull-out voltage: the up/down sweep shows the loop."""
    plate = plate_arrays(CouplerDevice(), 1)
    v_pi, v_po = float(plate.pull_in_volts[0]), float(plate.pull_out_volts[0])
    up = list(np.linspace(0.0, 1.01 * v_pi, 30))
    down = list(np.linspace(1.01 * v_pi, 0.0, 600))
    sweep = _sweep(up + down)[len(up) :]
    released_at = next(v for v, pulled, _ in sweep if not pulled)
    assert released_at < v_po
    assert released_at > v_po - 1.01 * v_pi / 599 * 1.5
    still_down = [pulled for v, pulled, _ in sweep if v_po < v < v_pi]
    assert still_down and all(still_down)
