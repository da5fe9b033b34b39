"""The virtual lab's seeded drifts: reproducible for a seed and a time whatever the order of
the queries, and with the statistics of the processes they stand for."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from labrun.vlab.realism import GRID_S, KEEP, PolarisationWalk, RandomWalk, role_rng


def _walk(seed: int = 7) -> RandomWalk:
    return RandomWalk(role_rng(seed, "power_walk", "laser_a"), 0.02)


def test_a_drift_depends_on_the_time_not_on_the_queries():
    """Dense and sparse query patterns (threads answer in varying order, polled sweeps ask a
    varying number of times) give the same value at the same simulated time."""
    times = [0.0, 3.7, 12.0, 12.5, 40.2, 41.0, 300.9]
    dense, sparse = _walk(), _walk()
    for t in np.arange(0.0, 301.0, 0.05):
        dense.value(float(t))
    for t in times:  # dense has been asked up to 301 s already (within its KEEP window)
        assert sparse.value(t) == dense.value(t)
    assert sparse.value(12.0) != sparse.value(300.9)  # it does move
    assert sparse.value(12.0) == sparse.value(12.0 + 0.5 * GRID_S)  # constant within a step


def test_a_drift_asked_slightly_back_in_time_gives_that_time():
    """Queries from threads arrive slightly out of order: an earlier time within KEEP steps
    gets its own value, not the latest."""
    w, ref = _walk(), _walk()
    late = w.value(100.0)
    assert w.value(50.0) == ref.value(50.0) != late
    assert w.value((100 - KEEP - 5) * GRID_S) == w.value((100 - KEEP + 1) * GRID_S)


def test_random_walk_variance_grows_as_sigma_squared_t():
    """Wiener process: Var W(t) = sigma^2 t (any probability text, e.g. Gardiner, Stochastic
    Methods, 4th ed., sec. 3.8.1). 0.02 dB/sqrt(h) after 0.1 h: standard deviation
    0.02 sqrt(0.1) dB; over 800 seeds the sample standard deviation is within 10 % (its own
    standard error is 2.5 %; a step variance off by a factor 2 moves it by 41 %)."""
    sd = 0.02 * np.sqrt(0.1)
    ends = [RandomWalk(role_rng(s, "w"), 0.02).value(360.0) for s in range(800)]
    assert np.std(ends, ddof=1) == pytest.approx(sd, rel=0.10)
    assert abs(np.mean(ends)) < 4 * sd / np.sqrt(800)


def test_polarisation_walk_rms_angle_after_its_hours_is_about_one_radian():
    """Isotropic Brownian rotation with angle variance 1/hours per hour: after `hours` the
    rotation angle's mean square is 1 rad^2 in the small-step sum (three independent axes of
    variance 1/3 each). 300 seeds, a 0.1 h walk after 0.1 h: the rms angle within 15 % of
    1 rad (a factor 2 in the variance moves it by 41 %). The angle is read as the rotation of
    a Stokes vector and of one orthogonal to it (together they fix the rotation)."""
    angles = []
    e1, e2 = np.array([1.0, 0.0, 0.0]), np.array([0.0, 1.0, 0.0])
    for s in range(300):
        w = PolarisationWalk(role_rng(s, "pol"), 0.1)
        r = Rotation.align_vectors(np.vstack([w.rotate(e1, 360.0), w.rotate(e2, 360.0)]),
                                   np.vstack([e1, e2]))[0]
        angles.append(np.linalg.norm(r.as_rotvec()))
    assert np.sqrt(np.mean(np.square(angles))) == pytest.approx(1.0, rel=0.15)
