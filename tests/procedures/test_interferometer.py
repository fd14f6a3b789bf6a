"""The ideal lattice used for a phase step's fringe reference, against the textbook and the simulator."""

from __future__ import annotations

import math

import numpy as np
import pytest

from meshwarden.procedures.coupler_fit import balanced_coupling_ratio
from meshwarden.procedures.interferometer import fringe_reference, tap_powers
from meshwarden.procedures.lattice import LatticeTopology

MZI = LatticeTopology(2, {"g0": (0, 0), "g1": (1, 0)}, {"top": (1, 0), "bottom": (1, 1)}, (0,))


@pytest.mark.parametrize("phi", [0.0, 0.7, math.pi / 2, 2.0, math.pi])
def test_a_balanced_mzi_splits_as_the_textbook_says(phi: float) -> None:
    """Two 50:50 couplers around a phase phi: outputs sin^2(phi/2) and cos^2(phi/2) (standard MZI
    result, with the i of the cross port: the top output is sin^2(phi/2))."""
    powers = tap_powers(MZI, {"g0": 0.5, "g1": 0.5}, {"g0": phi})
    assert powers["top"] == pytest.approx(math.sin(phi / 2) ** 2, abs=1e-12)
    assert powers["bottom"] == pytest.approx(math.cos(phi / 2) ** 2, abs=1e-12)


def test_the_fringe_reference_places_the_textbook_fringe() -> None:
    """top = sin^2(phi/2) = 1/2 + 1/2 cos(phi + pi): reference pi, full contrast (four-step phase
    stepping, Creath 1988)."""
    reference, contrast = fringe_reference(MZI, "g0", ("top",), {"g0": 0.5, "g1": 0.5}, {})
    assert reference == pytest.approx(math.pi, abs=1e-12)
    assert contrast == pytest.approx(1.0, abs=1e-12)


def test_the_ideal_lattice_agrees_with_the_simulators_lattice() -> None:
    """On a 4-mode, 3-column lattice with random couplings and phases, the daemon's ideal model
    gives the tap powers of the simulator's own lossless lattice (an independent implementation
    of the same conventions; reference computation)."""
    from meshsim.physics import optics

    rng = np.random.default_rng(3)
    columns = [{"a": 0, "b": 2}, {"c": 1}, {"d": 0, "e": 2}]
    taps = {f"m{c}{k}": (c, k) for c in (-1, 0, 1, 2) for k in range(4)}
    topology = LatticeTopology.from_lattice(4, columns, taps, (0, 2))
    gates = [g for column in columns for g in column]
    layout = optics.LatticeLayout(
        4, tuple(tuple((gates.index(g), top) for g, top in col.items()) for col in columns), tuple(taps.values()), 1e-9
    )
    lattice = optics.Lattice(layout)
    for _ in range(5):
        kappa = rng.uniform(0, 1, len(gates))
        phase = rng.uniform(0, 2 * math.pi, len(gates))
        field = np.zeros(4, dtype=complex)
        field[[0, 2]] = 1.0
        _, reference = lattice.propagate(field, kappa, phase, np.ones(len(gates)))
        ours = tap_powers(topology, dict(zip(gates, kappa, strict=True)), dict(zip(gates, phase, strict=True)))
        # the simulator's taps take a fraction 1e-9 of the light (and leave the rest): scale
        assert [ours[m] * 1e-9 for m in taps] == pytest.approx(list(reference), rel=1e-6, abs=1e-20)


def test_balanced_ratio_takes_out_unequal_path_transmissions() -> None:
    """A coupler kappa = sin^2(theta) swept over theta, its cross light seen through 0.45 dB more
    loss than its bar light (one more gate, common practice): the plain ratio is off by up to
    0.03, the balanced one recovers kappa to 1e-9 (power conservation of a lossless 2x2)."""
    theta = np.linspace(0.05, 1.5, 12)
    kappa = np.sin(theta) ** 2
    bar, cross = 7e-6 * (1 - kappa), 7e-6 * kappa * 10 ** (-0.45 / 10)
    plain = cross / (bar + cross)
    assert np.max(np.abs(plain - kappa)) > 0.02
    assert balanced_coupling_ratio(bar, cross) == pytest.approx(kappa, abs=1e-9)
