"""Seeded imperfections of the virtual lab: fixed offsets, slow random-walk drifts and a
polarisation random walk. Reproducible: the same seed and the same query times give the same values.
"""

from __future__ import annotations

import zlib

import numpy as np
from scipy.spatial.transform import Rotation


def role_rng(seed: int, *names: str) -> np.random.Generator:
    """Independent generator per (seed, purpose, role), stable across runs and thread timings."""
    words = [zlib.crc32(n.encode()) for n in names]
    return np.random.default_rng(np.random.SeedSequence([int(seed) & 0xFFFFFFFF, *words]))


class RandomWalk:
    """Scalar Brownian drift: variance grows as sigma^2 * t (sigma per sqrt(second)).

    Sampled lazily at non-decreasing times; earlier times return the latest value.
    """

    def __init__(self, rng: np.random.Generator, sigma_per_sqrt_h: float):
        self._rng = rng
        self._sigma = sigma_per_sqrt_h / 60.0  # per sqrt(second): sqrt(3600) = 60
        self._t = 0.0
        self._value = 0.0

    def value(self, t_s: float) -> float:
        """Drift at simulated time t_s (seconds since the lab started)."""
        if self._sigma > 0 and t_s > self._t:
            self._value += float(self._rng.normal(0.0, self._sigma * np.sqrt(t_s - self._t)))
        self._t = max(self._t, t_s)
        return self._value


class PolarisationWalk:
    """Slow random rotation of a Stokes vector (fibre birefringence drifting with temperature).

    Brownian motion on the rotation group: after ``hours`` the rms rotation angle is about 1 rad.
    """

    def __init__(self, rng: np.random.Generator, hours: float):
        self._rng = rng
        self._rate = 0.0 if hours <= 0 else 1.0 / (hours * 3600.0)  # angle variance per second
        self._t = 0.0
        self._rot = Rotation.identity()

    def rotate(self, stokes: np.ndarray, t_s: float) -> np.ndarray:
        """Apply the drift accumulated up to t_s to a Stokes unit vector."""
        if self._rate > 0 and t_s > self._t:
            sd = np.sqrt(self._rate * (t_s - self._t) / 3.0)
            self._rot = Rotation.from_rotvec(self._rng.normal(0.0, sd, 3)) * self._rot
        self._t = max(self._t, t_s)
        return self._rot.apply(np.asarray(stokes, dtype=float))
