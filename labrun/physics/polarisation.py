"""Polarisation: the scalar projection model (docs/design.md §5.5) and a three-paddle controller.

Only the co-polarised part of the two tones beats. With Stokes unit vectors s_a, s_b the
copolar power fraction of tone b is (1 + s_a . s_b)/2 = cos^2(Theta/2), Theta their angle on the
Poincare sphere; the modulation index scales with its square root. Real fibre with random
birefringence departs from this (averaged models carry factors such as 8/9, from memory).

The polarisation controller is modelled as quarter-, half- and quarter-wave linear retarders in
a row, each with its fast axis at the paddle angle (Jones and Mueller calculus). Stokes
convention: s1 horizontal/vertical, s2 +45/-45 linear, s3 circular with
s3 = 2 Im(Ex* Ey) / (|Ex|^2 + |Ey|^2).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

PADDLE_RETARDANCES_RAD = (np.pi / 2.0, np.pi, np.pi / 2.0)  # quarter, half, quarter wave


def _unit(s: ArrayLike) -> np.ndarray:
    """Normalise Stokes vectors (last axis of length 3) to the unit sphere."""
    v = np.asarray(s, dtype=float)
    if v.shape[-1] != 3:
        raise ValueError("a Stokes vector has three components (s1, s2, s3)")
    n = np.linalg.norm(v, axis=-1, keepdims=True)
    if np.any(n == 0):
        raise ValueError("a Stokes vector must not be zero")
    return v / n


def copolar_fraction(s_a: ArrayLike, s_b: ArrayLike) -> float | np.ndarray:
    """(1 + s_a . s_b)/2 for normalised Stokes vectors: 1 parallel, 0 orthogonal (vectorised)."""
    f = (1.0 + np.sum(_unit(s_a) * _unit(s_b), axis=-1)) / 2.0
    f = np.clip(f, 0.0, 1.0)
    return float(f) if np.ndim(f) == 0 else f


def modulation_scale(s_a: ArrayLike, s_b: ArrayLike) -> float | np.ndarray:
    """Factor on the modulation index: sqrt(copolar fraction) = |cos(Theta/2)|."""
    return np.sqrt(copolar_fraction(s_a, s_b))


def jones_retarder(retardance_rad: float, angle_rad: float) -> np.ndarray:
    """Jones matrix of a linear retarder with its fast axis at angle_rad (global phase dropped)."""
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    rot = np.array([[c, -s], [s, c]])
    return rot @ np.diag([1.0, np.exp(1j * retardance_rad)]) @ rot.T


def mueller_retarder(retardance_rad: float, angle_rad: float) -> np.ndarray:
    """3x3 Stokes-space (Mueller, polarised part) matrix: rotation by the retardance about the
    axis (cos 2 angle, sin 2 angle, 0) of the Poincare sphere."""
    axis = np.array([np.cos(2 * angle_rad), np.sin(2 * angle_rad), 0.0])
    k = np.array([[0.0, -axis[2], axis[1]], [axis[2], 0.0, -axis[0]], [-axis[1], axis[0], 0.0]])
    d = retardance_rad
    # Rodrigues: right-handed rotation by the retardance (matches jones_retarder, this convention).
    return np.eye(3) + np.sin(d) * k + (1.0 - np.cos(d)) * (k @ k)


def stokes_from_jones(e: ArrayLike) -> np.ndarray:
    """Normalised Stokes vector (s1, s2, s3) of a Jones vector (Ex, Ey)."""
    ex, ey = np.asarray(e, dtype=complex)
    s0 = abs(ex) ** 2 + abs(ey) ** 2
    return (
        np.array(
            [abs(ex) ** 2 - abs(ey) ** 2, 2 * (np.conj(ex) * ey).real, 2 * (np.conj(ex) * ey).imag]
        )
        / s0
    )


def paddles_to_stokes(angles_deg: ArrayLike, s_in: ArrayLike = (1.0, 0.0, 0.0)) -> np.ndarray:
    """Output Stokes vector of quarter-half-quarter wave paddles at angles_deg (fast axes)."""
    angles = np.radians(np.asarray(angles_deg, dtype=float))
    if angles.shape != (3,):
        raise ValueError("three paddle angles are needed (quarter, half, quarter wave)")
    s = _unit(s_in)
    for d, th in zip(PADDLE_RETARDANCES_RAD, angles, strict=True):
        s = mueller_retarder(d, float(th)) @ s
    return s
