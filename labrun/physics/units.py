"""Unit conversions used everywhere (docs/design.md §5.1). Pure numpy, no I/O.

c is exact (SI). dBm <-> mW is common practice: P[mW] = 10^(P[dBm]/10).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

C_M_PER_S = 299_792_458.0  # speed of light in vacuum, exact (SI definition)
NEPER_PER_DB = np.log(10.0) / 10.0  # alpha[1/km] = alpha_dB[dB/km] * ln(10)/10


def dbm_to_mw(p_dbm: ArrayLike) -> np.ndarray:
    """dBm -> mW (common practice)."""
    return np.power(10.0, np.asarray(p_dbm, dtype=float) / 10.0)


def mw_to_dbm(p_mw: ArrayLike) -> np.ndarray:
    """mW -> dBm; zero or negative power gives -inf rather than a warning."""
    p = np.asarray(p_mw, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(p > 0, 10.0 * np.log10(np.where(p > 0, p, 1.0)), -np.inf)


def dbm_to_w(p_dbm: ArrayLike) -> np.ndarray:
    """dBm -> W."""
    return dbm_to_mw(p_dbm) * 1e-3


def w_to_dbm(p_w: ArrayLike) -> np.ndarray:
    """W -> dBm."""
    return mw_to_dbm(np.asarray(p_w, dtype=float) * 1e3)


def nm_to_thz(wavelength_nm: ArrayLike) -> np.ndarray:
    """Vacuum wavelength (nm) -> frequency (THz): f = c / lambda."""
    return C_M_PER_S / (np.asarray(wavelength_nm, dtype=float) * 1e-9) * 1e-12


def thz_to_nm(freq_thz: ArrayLike) -> np.ndarray:
    """Frequency (THz) -> vacuum wavelength (nm)."""
    return C_M_PER_S / (np.asarray(freq_thz, dtype=float) * 1e12) * 1e9


def ghz_to_nm_at(spacing_ghz: ArrayLike, wavelength_nm: float) -> np.ndarray:
    """Small frequency interval -> wavelength interval at lambda: d_lambda = lambda^2 d_f / c."""
    lam_m = wavelength_nm * 1e-9
    return lam_m**2 * np.asarray(spacing_ghz, dtype=float) * 1e9 / C_M_PER_S * 1e9


def nm_to_ghz_at(interval_nm: ArrayLike, wavelength_nm: float) -> np.ndarray:
    """Small wavelength interval -> frequency interval at lambda: d_f = c d_lambda / lambda^2."""
    lam_m = wavelength_nm * 1e-9
    return C_M_PER_S * np.asarray(interval_nm, dtype=float) * 1e-9 / lam_m**2 * 1e-9


def alpha_per_km(loss_db_per_km: ArrayLike) -> np.ndarray:
    """Power attenuation coefficient alpha [1/km] from loss in dB/km."""
    return np.asarray(loss_db_per_km, dtype=float) * NEPER_PER_DB


def effective_length_km(length_km: float, loss_db_per_km: float) -> float:
    """L_eff = (1 - exp(-alpha L)) / alpha (Agrawal, Nonlinear Fiber Optics); L when lossless."""
    a = float(alpha_per_km(loss_db_per_km))
    if a * length_km < 1e-12:
        return float(length_km)
    return float(-np.expm1(-a * length_km) / a)


def beta2_ps2_per_km(dispersion_ps_per_nm_km: ArrayLike, wavelength_nm: ArrayLike) -> np.ndarray:
    """GVD beta2 [ps^2/km] from D: beta2 = -D lambda^2 / (2 pi c) (Agrawal)."""
    lam_m = np.asarray(wavelength_nm, dtype=float) * 1e-9
    d_si = np.asarray(dispersion_ps_per_nm_km, dtype=float) * 1e-6  # ps/(nm km) -> s/m^2
    return -d_si * lam_m**2 / (2.0 * np.pi * C_M_PER_S) * 1e24 * 1e3  # s^2/m -> ps^2/km


def beta3_ps3_per_km(
    dispersion_ps_per_nm_km: ArrayLike, slope_ps_per_nm2_km: ArrayLike, wavelength_nm: ArrayLike
) -> np.ndarray:
    """Third-order dispersion beta3 [ps^3/km] = lambda^2 (lambda^2 S + 2 lambda D) / (2 pi c)^2.

    Follows from beta3 = d beta2 / d omega with beta2 = -D lambda^2/(2 pi c) (Agrawal).
    """
    lam_m = np.asarray(wavelength_nm, dtype=float) * 1e-9
    d_si = np.asarray(dispersion_ps_per_nm_km, dtype=float) * 1e-6  # s/m^2
    s_si = np.asarray(slope_ps_per_nm2_km, dtype=float) * 1e3  # ps/(nm^2 km) -> s/m^3
    two_pi_c = 2.0 * np.pi * C_M_PER_S
    beta3_si = lam_m**2 * (lam_m**2 * s_si + 2.0 * lam_m * d_si) / two_pi_c**2  # s^3/m
    return beta3_si * 1e36 * 1e3  # s^3/m -> ps^3/km
