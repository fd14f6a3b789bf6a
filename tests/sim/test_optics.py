"""Optics of couplers, phase shifters and the lattice against closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest

from meshsim.params import CouplerDevice
from meshsim.physics import optics
from tests.sim.helpers import small_params


def test_coupler_power_coupling_check_values() -> None:
    """kappa = sin^2(C L): C L = pi/4 -> 0.5; pi/2 -> 1.
    Source: Yariv, IEEE JQE 9:919 (1973); Haus & Huang, Proc. IEEE 79:1505 (1991)."""
    assert float(optics.kappa_from_coupling(math.pi / 4, 1.0)) == pytest.approx(0.5, abs=1e-15)
    assert float(optics.kappa_from_coupling(math.pi / 2, 1.0)) == pytest.approx(1.0, abs=1e-15)


def test_evanescent_decay_length_of_the_demo_coupler() -> None:
    """1/gamma = 1 / (k0 sqrt(n_eff^2 - n_clad^2)): n_eff=2.4, air cladding, 1550 nm -> 113 nm.
    Source: Chrostowski & Hochberg, Silicon Photonics Design, CUP 2015 (from memory). The demo's
    coupler decay length is that value."""
    k0 = 2 * math.pi / 1550e-9
    decay = 1 / (k0 * math.sqrt(2.4**2 - 1.0))
    assert decay == pytest.approx(113e-9, rel=0.005)
    assert CouplerDevice().coupling_decay_m == pytest.approx(decay, rel=0.005)


@pytest.mark.parametrize("kappa", [0.0, 0.13, 0.5, 0.97, 1.0])
def test_coupler_matrix_is_unitary(kappa: float) -> None:
    """[[sqrt(1-k), i sqrt(k)], [i sqrt(k), sqrt(1-k)]] U U^H = I to 1e-12 (standard)."""
    u = optics.coupler_matrix(kappa)
    assert np.allclose(u @ u.conj().T, np.eye(2), atol=1e-12)


def _lattice(
    modes: int, columns: list[list[tuple[int, int]]], taps: tuple[tuple[int, int], ...] = (), tap_fraction: float = 0.0
) -> optics.Lattice:
    layout = optics.LatticeLayout(modes, tuple(tuple(c) for c in columns), taps, tap_fraction)
    return optics.Lattice(layout)


def _mzi(phi: float, kappa: float = 0.5) -> np.ndarray:
    lattice = _lattice(2, [[(0, 0)], [(1, 0)]])
    out, _ = lattice.propagate(
        np.array([1.0, 0.0], dtype=complex), np.array([kappa, kappa]), np.array([phi, 0.0]), np.ones(2)
    )
    return np.abs(out) ** 2


@pytest.mark.parametrize("phi", [0.0, math.pi / 2, math.pi, 2.0])
def test_mzi_outputs(phi: float) -> None:
    """Two 50:50 couplers with phase phi between them: top output sin^2(phi/2), bottom cos^2(phi/2)
    (standard; our conventions: port 0 -> 0 is 'bar', phase delays the top arm by exp(+i phi))."""
    top, bottom = _mzi(phi)
    assert top == pytest.approx(math.sin(phi / 2) ** 2, abs=1e-12)
    assert bottom == pytest.approx(math.cos(phi / 2) ** 2, abs=1e-12)


def test_extinction_ratio_of_unequal_couplers() -> None:
    """ER = -20 log10 |1 - 2 kappa| for an MZI of two equal couplers: kappa = 0.45 -> 20.000 dB
    (derived; shared/PHYSICS.md), at the port whose two paths are bar-bar and cross-cross."""
    powers = np.array([_mzi(phi, 0.45)[0] for phi in np.linspace(0, 2 * math.pi, 4001)])
    assert 10 * math.log10(powers.max() / powers.min()) == pytest.approx(20.0, abs=0.01)


def test_lossless_lattice_is_unitary() -> None:
    """A 16-mode, 8-column lattice with random settings, no loss and no taps: the transfer matrix
    is unitary to 1e-12 (power conservation)."""
    rng = np.random.default_rng(7)
    columns, n = [], 0
    for col in range(8):
        columns.append([(n + i, top) for i, top in enumerate(range(col % 2, 15, 2))])
        n += len(columns[-1])
    lattice = _lattice(16, columns)
    kappa, phase = rng.random(n), rng.uniform(0, 2 * math.pi, n)
    u = np.column_stack(
        [lattice.propagate(np.eye(16)[k].astype(complex), kappa, phase, np.ones(n))[0] for k in range(16)]
    )
    assert np.allclose(u @ u.conj().T, np.eye(16), atol=1e-12)


def test_taps_take_their_fraction() -> None:
    """A 1 % tap after a bar-state gate sees 1 % of the power in its mode, and the rest goes on."""
    lattice = _lattice(2, [[(0, 0)]], taps=((0, 0),), tap_fraction=0.01)
    out, taps = lattice.propagate(np.array([1.0, 0.0], dtype=complex), np.zeros(1), np.zeros(1), np.ones(1))
    assert taps[0] == pytest.approx(0.01, abs=1e-15)
    assert abs(out[0]) ** 2 == pytest.approx(0.99, abs=1e-15)


def test_phase_shifter_curve_is_monotone_and_reaches_two_pi() -> None:
    """The comb-drive phase shifter's phase rises monotonically with volts and reaches 2 pi
    within the demo limit (effective-index perturbation; Chrostowski & Hochberg 2015, from memory)."""
    from meshsim.devices import comb_arrays

    params = small_params()
    comb = comb_arrays(params.phase, 1)
    volts = np.linspace(0, 44, 441)
    phase = comb.phase(comb.equilibrium(volts), params.laser.wavelength_m)
    assert np.all(np.diff(phase) > 0)
    assert phase[-1] > 2 * math.pi
