"""Seeded imperfections of the virtual lab: fixed offsets, slow random-walk drifts and a
polarisation random walk. Reproducible: the same seed and the same simulated time give the
same values, in any query order.
"""

from __future__ import annotations

import zlib
from collections import deque
from collections.abc import Callable
from typing import Any

import numpy as np
from scipy.spatial.transform import Rotation


def role_rng(seed: int, *names: str) -> np.random.Generator:
    """Independent generator per (seed, purpose, role), stable across runs and thread timings."""
    words = [zlib.crc32(n.encode()) for n in names]
    return np.random.default_rng(np.random.SeedSequence([int(seed) & 0xFFFFFFFF, *words]))


GRID_S = 1.0  # drift sampling step, simulated seconds: a drift moves far below the OSA noise in 1 s
KEEP = 600  # grid values kept back (memory stays flat over a night at time scale 1)


class _Grid:
    """Values of a seeded walk on a fixed time grid, drawn in grid order.

    The value at time t is the walk at the last grid point at or before t, so it depends on t
    and the seed alone, not on how often or in which order the instruments asked (threads
    answer in varying order, and a polled sweep asks a varying number of times).
    """

    def __init__(self, rng: np.random.Generator, step: Callable[[Any, np.random.Generator], Any],
                 start: Any):
        self._rng = rng
        self._step = step
        self._values: deque[Any] = deque([start], maxlen=KEEP)
        self._last = 0  # grid index of self._values[-1]

    def at(self, t_s: float) -> Any:
        """The walk's value at simulated time t_s (>= 0); a time older than the KEEP grid
        points kept gets the oldest kept (queries run forward but for thread interleaving)."""
        k = max(0, int(t_s // GRID_S))
        while self._last < k:
            self._values.append(self._step(self._values[-1], self._rng))
            self._last += 1
        return self._values[max(0, len(self._values) - 1 - (self._last - k))]


class RandomWalk:
    """Scalar Brownian drift: variance grows as sigma^2 * t (sigma per sqrt(second)).

    Sampled on a fixed 1 s grid (``_Grid``): reproducible for a seed and a time, whatever the
    order of the queries.
    """

    def __init__(self, rng: np.random.Generator, sigma_per_sqrt_h: float):
        self._sigma = sigma_per_sqrt_h / 60.0  # per sqrt(second): sqrt(3600) = 60
        sd = self._sigma * np.sqrt(GRID_S)
        self._grid = _Grid(rng, lambda v, r: v + float(r.normal(0.0, sd)), 0.0)

    def value(self, t_s: float) -> float:
        """Drift at simulated time t_s (seconds since the lab started)."""
        return float(self._grid.at(t_s)) if self._sigma > 0 else 0.0


class PolarisationWalk:
    """Slow random rotation of a Stokes vector (fibre birefringence drifting with temperature).

    Brownian motion on the rotation group: after ``hours`` the rms rotation angle is about 1 rad.
    Sampled on the same fixed grid as RandomWalk, for the same reproducibility.
    """

    def __init__(self, rng: np.random.Generator, hours: float):
        self._rate = 0.0 if hours <= 0 else 1.0 / (hours * 3600.0)  # angle variance per second
        sd = np.sqrt(self._rate * GRID_S / 3.0)
        self._grid = _Grid(rng, lambda rot, r: Rotation.from_rotvec(
            r.normal(0.0, sd, 3)) * rot, Rotation.identity())

    def rotate(self, stokes: np.ndarray, t_s: float) -> np.ndarray:
        """Apply the drift accumulated up to t_s to a Stokes unit vector."""
        v = np.asarray(stokes, dtype=float)
        return self._grid.at(t_s).apply(v) if self._rate > 0 else v
