"""Two tones without dispersion: the Bessel (dual-frequency) model of docs/design.md §5.2.

Thompson and Roy, Phys. Rev. A 43, 4987 (1991); Boskovic et al., Opt. Lett. 21, 1966 (1996).
The Kerr phase gamma L_eff |E|^2 of two beating tones carries a cosine at the spacing; the
Jacobi-Anger expansion puts lines on the grid f_a + k delta with powers
P_k = T [P_a J_k(m)^2 + P_b J_(k-1)(m)^2], m = 2 gamma L_eff sqrt(P_a P_b). Exact while
dispersion is negligible, for any powers and any number of orders.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import jv

from labrun.lines import grid_ks


def modulation_index(
    gamma_per_w_per_km: ArrayLike, l_eff_km: ArrayLike, p_a_w: ArrayLike, p_b_w: ArrayLike
) -> float | np.ndarray:
    """Kerr phase-modulation index m = 2 gamma L_eff sqrt(P_a P_b) (radians; vectorised)."""
    m = (
        2.0
        * np.asarray(gamma_per_w_per_km, dtype=float)
        * np.asarray(l_eff_km, dtype=float)
        * np.sqrt(np.asarray(p_a_w, dtype=float) * np.asarray(p_b_w, dtype=float))
    )
    return float(m) if m.ndim == 0 else m


def two_tone_powers(
    p_a_w: float,
    p_b_w: float,
    m: float,
    orders: int,
    transmission: float = 1.0,
) -> np.ndarray:
    """Line powers (W) for k in grid_ks(orders): P_k = T [P_a J_k(m)^2 + P_b J_(k-1)(m)^2]."""
    if orders < 0:
        raise ValueError("orders must be >= 0")
    ks = np.asarray(grid_ks(orders), dtype=float)
    return transmission * (p_a_w * jv(ks, m) ** 2 + p_b_w * jv(ks - 1.0, m) ** 2)


def first_sideband_ratio_equal(m: ArrayLike) -> float | np.ndarray:
    """Equal-power first-sideband-to-tone ratio (J1^2 + J2^2)/(J0^2 + J1^2) (Boskovic et al.)."""
    m = np.asarray(m, dtype=float)
    j0, j1, j2 = jv(0, m), jv(1, m), jv(2, m)
    r = (j1**2 + j2**2) / (j0**2 + j1**2)
    return float(r) if r.ndim == 0 else r


def two_tone_powers_dispersionless(
    gamma_per_w_per_km: float,
    l_eff_km: float,
    p_a_w: float,
    p_b_w: float,
    orders: int,
    transmission: float = 1.0,
) -> np.ndarray:
    """Convenience: line powers (W) straight from gamma, L_eff and the launched powers."""
    m = modulation_index(gamma_per_w_per_km, l_eff_km, p_a_w, p_b_w)
    return two_tone_powers(p_a_w, p_b_w, float(m), orders, transmission)
