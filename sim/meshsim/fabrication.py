"""Fabrication errors of one chip's optics, drawn once from the seed.

* Static phase error of each gate's phase arm: the arm's optical path differs from its design
  by many wavelengths' worth of random error (waveguide width and thickness vary along
  centimetres of silicon), so its phase at rest is uniform over [0, 2 pi) - the working
  assumption of self-configuring and calibrated meshes (Miller, Photon. Res. 1:1, 2013) and
  the reason every programmable mesh is calibrated before use (common practice).
* Splitting error of each gate's coupler: an additive error of the coupler's splitting angle,
  kappa = sin^2(C L + delta), the error model used for imperfect beam splitters in meshes
  (Miller, Optica 2:747, 2015; Pai et al., Phys. Rev. Applied 11:064044, 2019; from memory).
  The error is normal with the configured standard deviation - a stand-in for gap, width and
  bend-coupling errors together. With a small design angle at rest, a negative error can make
  the rest angle negative: the coupler then passes through full bar (kappa = 0) as it is driven.

Each error has its own random stream, so switching one off does not change the others.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from meshsim.params import Spread

F = NDArray[np.float64]

_STATIC_PHASE, _SPLITTING = 0, 1


@dataclass(frozen=True)
class Fabrication:
    """Per gate: the static phase error of its phase arm and the splitting-angle error of its coupler."""

    static_phase_rad: F
    splitting_angle_rad: F


def _rng(seed: np.random.SeedSequence, key: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed.entropy, spawn_key=(*seed.spawn_key, key)))


def draw_fabrication(spread: Spread, gates: int, seed: np.random.SeedSequence) -> Fabrication:
    """The errors of ``gates`` gates; a span or a deviation of 0 gives exact zeros."""
    static = np.zeros(gates)
    if spread.static_phase_span_rad > 0.0:
        static = _rng(seed, _STATIC_PHASE).uniform(0.0, spread.static_phase_span_rad, gates)
    splitting = np.zeros(gates)
    if spread.splitting_angle_rad > 0.0:
        splitting = _rng(seed, _SPLITTING).normal(0.0, spread.splitting_angle_rad, gates)
    return Fabrication(static_phase_rad=static, splitting_angle_rad=splitting)
