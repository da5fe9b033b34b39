"""Polarisation (docs/design.md §5.5): copolar fraction and the quarter-half-quarter paddles."""

from __future__ import annotations

import numpy as np
import pytest

from labrun.physics.polarisation import (
    copolar_fraction,
    jones_retarder,
    modulation_scale,
    mueller_retarder,
    paddles_to_stokes,
    stokes_from_jones,
)


def test_copolar_fraction_parallel_orthogonal_and_between() -> None:
    # Scalar projection: (1 + s_a . s_b)/2 = cos^2(Theta/2) (docs/design.md §5.5; Poincare sphere).
    h, v, d = (1, 0, 0), (-1, 0, 0), (0, 1, 0)
    assert copolar_fraction(h, h) == pytest.approx(1.0)
    assert copolar_fraction(h, v) == pytest.approx(0.0)
    assert copolar_fraction(h, d) == pytest.approx(0.5)  # linear at 45 deg: Malus, cos^2 45
    theta = np.linspace(0, np.pi, 7)
    s_b = np.stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)], axis=-1)
    np.testing.assert_allclose(copolar_fraction(h, s_b), np.cos(theta / 2) ** 2, atol=1e-15)
    np.testing.assert_allclose(modulation_scale(h, s_b), np.abs(np.cos(theta / 2)), atol=1e-8)


def test_copolar_fraction_equals_jones_projection() -> None:
    # |<e_a|e_b>|^2 for unit Jones vectors is the copolar power fraction (Jones calculus).
    rng = np.random.default_rng(3)
    for _ in range(20):
        ea, eb = (rng.normal(size=2) + 1j * rng.normal(size=2) for _ in range(2))
        ea, eb = ea / np.linalg.norm(ea), eb / np.linalg.norm(eb)
        proj = abs(np.vdot(ea, eb)) ** 2
        assert copolar_fraction(stokes_from_jones(ea), stokes_from_jones(eb)) == pytest.approx(
            proj, abs=1e-12
        )


def test_wave_plates_textbook_cases() -> None:
    # Hecht, Optics (from memory): a quarter-wave plate at 45 deg turns horizontal light
    # circular; a half-wave plate at 22.5 deg turns it to linear +45 deg.
    h = np.array([1.0, 0.0, 0.0])
    circ = mueller_retarder(np.pi / 2, np.radians(45.0)) @ h
    assert abs(circ[2]) == pytest.approx(1.0)
    assert mueller_retarder(np.pi, np.radians(22.5)) @ h == pytest.approx(
        [0.0, 1.0, 0.0], abs=1e-12
    )
    # Paddles at 0 deg leave horizontal light alone. Quarter at 0 (axis = H, no effect), half at
    # 22.5 deg (H -> +45 deg), quarter at 45 deg (axis = +45 deg, no effect): linear +45 deg.
    assert paddles_to_stokes((0.0, 0.0, 0.0)) == pytest.approx(h, abs=1e-12)
    assert paddles_to_stokes((0.0, 22.5, 45.0)) == pytest.approx([0.0, 1.0, 0.0], abs=1e-12)
    # ... and with the last quarter at 0 deg instead, +45 deg linear becomes circular.
    assert abs(paddles_to_stokes((0.0, 22.5, 0.0))[2]) == pytest.approx(1.0)


def test_mueller_matches_jones_for_random_plates_and_paddles() -> None:
    # The Stokes-space rotation must equal the Jones-matrix result (Jones/Mueller calculus).
    rng = np.random.default_rng(7)
    for _ in range(20):
        e = rng.normal(size=2) + 1j * rng.normal(size=2)
        ang = rng.uniform(-180, 180, 3)
        j = np.eye(2, dtype=complex)
        for ret, a in zip((np.pi / 2, np.pi, np.pi / 2), np.radians(ang), strict=True):
            j = jones_retarder(ret, a) @ j
        expected = stokes_from_jones(j @ e)
        got = paddles_to_stokes(ang, stokes_from_jones(e))
        np.testing.assert_allclose(got, expected, atol=1e-12)
        assert np.linalg.norm(got) == pytest.approx(1.0)


def test_paddles_reach_the_whole_sphere() -> None:
    # A quarter-half-quarter controller can reach any state from any input (Lefevre 1980,
    # from memory): sample angles and check the orthogonal state is reached closely.
    grid = np.linspace(0, 180, 13)
    best = min(
        copolar_fraction((1, 0, 0), paddles_to_stokes((a, b, c)))
        for a in grid
        for b in grid
        for c in grid
    )
    assert best < 1e-3
