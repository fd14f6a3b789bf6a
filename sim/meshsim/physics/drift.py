"""Slow phase drift of a chip's arms, as a function of simulated time.

Two parts, both seeded and both answered lazily at whatever time the optics are read:

* a random walk per arm: each arm's phase is an independent Wiener process, so its variance
  grows as D^2 t (D in rad / sqrt(s)); the Wiener process and its linear growth of variance
  are the textbook model of diffusion (Einstein, Ann. Phys. 17:549, 1905; common practice for
  slow environmental phase noise in interferometers);
* temperature steps that move every arm by the same amount: a scheduled list, plus optional
  random steps at Poisson times. The size is given in radians; the thermo-optic coefficient of
  silicon, dn/dT ~ 1.8e-4 / K at 1550 nm (from memory), says what a kelvin does to a given
  path-length difference. A stand-in: no heat flow, an instantaneous step.

Reproducible whatever order times are asked in: the path is defined on a fixed grid (``grid_s``)
in chunks. Each chunk's end-to-end increment comes from a generator keyed by the chunk's block
number, and the path inside a chunk from one keyed by the chunk number, tied to that increment
as a Brownian bridge (Z_k - (k/K) Z_K is independent of Z_K for Gaussian steps). So a value at
time t costs O(t / chunk) cheap sums plus one chunk, and never depends on earlier queries.
Between grid points the path is interpolated linearly.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

F = NDArray[np.float64]

_ENDS, _INSIDE, _STEPS = 0, 1, 2


class PhaseDrift:
    """Drift phase in rad of ``arms`` arms at any simulated time (t <= 0 means no drift yet)."""

    def __init__(
        self,
        arms: int,
        seed: np.random.SeedSequence,
        rad_per_sqrt_s: float = 0.0,
        temperature_steps: tuple[tuple[float, float], ...] = (),
        temperature_step_interval_s: float = 0.0,
        temperature_step_rad: float = 0.0,
        grid_s: float = 0.01,
        chunk_points: int = 1000,
        chunks_per_block: int = 256,
    ) -> None:
        self.arms = arms
        self.rad_per_sqrt_s = rad_per_sqrt_s
        self.scheduled_steps = tuple(sorted(temperature_steps))
        self.step_interval_s = temperature_step_interval_s
        self.step_rad = temperature_step_rad
        self.grid_s = grid_s
        self.chunk_points = chunk_points
        self.chunk_s = grid_s * chunk_points
        self.chunks_per_block = chunks_per_block
        self._seed = seed
        # The walk at the start of every block reached so far, and the chunk ends of the last block.
        self._block_starts: list[F] = [np.zeros(arms)]
        self._block: tuple[int, F] | None = None
        self._inside: tuple[int, F] | None = None
        # Random temperature steps per window: (times, sizes) and the running total before each.
        self._window_s = 64.0 * temperature_step_interval_s
        self._windows: list[tuple[F, F]] = []
        self._window_totals = [0.0]

    def _rng(self, *key: int) -> np.random.Generator:
        seq = np.random.SeedSequence(self._seed.entropy, spawn_key=(*self._seed.spawn_key, *key))
        return np.random.default_rng(seq)

    # ------------------------------------------------------------------ random walk

    def _block_increments(self, block: int) -> F:
        """The end-to-end increments of the chunks of one block (one row per chunk)."""
        sigma = self.rad_per_sqrt_s * math.sqrt(self.chunk_s)
        return self._rng(_ENDS, block).standard_normal((self.chunks_per_block, self.arms)) * sigma

    def _chunk_ends(self, chunk: int) -> tuple[F, F]:
        """The walk at the start and at the end of chunk ``chunk``."""
        block, row = divmod(chunk, self.chunks_per_block)
        if self._block is None or self._block[0] != block:
            while len(self._block_starts) <= block:
                start = self._block_starts[-1]
                self._block_starts.append(start + self._block_increments(len(self._block_starts) - 1).sum(axis=0))
            ends = self._block_starts[block] + np.cumsum(self._block_increments(block), axis=0)
            self._block = (block, np.vstack([self._block_starts[block][None, :], ends]))
        ends = self._block[1]
        return ends[row], ends[row + 1]

    def _chunk_path(self, chunk: int) -> F:
        """The walk at the chunk's grid points 0..K (K + 1 rows), ends included."""
        if self._inside is not None and self._inside[0] == chunk:
            return self._inside[1]
        k = self.chunk_points
        sigma = self.rad_per_sqrt_s * math.sqrt(self.grid_s)
        steps = self._rng(_INSIDE, chunk).standard_normal((k, self.arms)) * sigma
        z = np.vstack([np.zeros((1, self.arms)), np.cumsum(steps, axis=0)])
        frac = (np.arange(k + 1) / k)[:, None]
        start, end = self._chunk_ends(chunk)
        path: F = np.asarray(start + z - frac * z[-1] + frac * (end - start))
        self._inside = (chunk, path)
        return path

    def random_walk_rad(self, t: float) -> F:
        """Each arm's random-walk phase at simulated time ``t``."""
        if self.rad_per_sqrt_s == 0.0 or t <= 0.0:
            return np.zeros(self.arms)
        chunk = int(t // self.chunk_s)
        within = (t - chunk * self.chunk_s) / self.grid_s
        point = min(int(within), self.chunk_points - 1)
        path = self._chunk_path(chunk)
        frac = within - point
        return np.asarray(path[point] + frac * (path[point + 1] - path[point]))

    # ------------------------------------------------------------------ temperature

    def _window(self, w: int) -> tuple[F, F]:
        while len(self._windows) <= w:
            n = len(self._windows)
            rng = self._rng(_STEPS, n)
            count = int(rng.poisson(self._window_s / self.step_interval_s))
            times = np.sort(rng.uniform(n * self._window_s, (n + 1) * self._window_s, count))
            sizes = rng.normal(0.0, self.step_rad, count)
            self._windows.append((times, sizes))
            self._window_totals.append(self._window_totals[-1] + float(sizes.sum()))
        return self._windows[w]

    def random_step_times(self, until_s: float) -> F:
        """When the random temperature steps happen, up to ``until_s`` (for inspection)."""
        if self.step_interval_s == 0.0 or until_s <= 0.0:
            return np.zeros(0)
        last = int(until_s // self._window_s)
        times = np.concatenate([self._window(w)[0] for w in range(last + 1)])
        return np.asarray(times[times <= until_s])

    def temperature_rad(self, t: float) -> float:
        """The common phase shift of every arm at ``t``: the sum of all steps at or before ``t``."""
        total = sum(rad for at_s, rad in self.scheduled_steps if at_s <= t)
        if self.step_interval_s > 0.0 and t > 0.0:
            w = int(t // self._window_s)
            times, sizes = self._window(w)
            total += self._window_totals[w] + float(sizes[times <= t].sum())
        return float(total)

    # ------------------------------------------------------------------ both

    def phase_rad(self, t: float) -> F:
        """The drift phase of every arm at ``t`` (random walk plus temperature)."""
        return self.random_walk_rad(t) + self.temperature_rad(t)
