"""Small-signal four-wave mixing with phase mismatch (docs/design.md §5.3).

Shibata, Braun and Waarts, IEEE J. Quantum Electron. 23, 1205 (1987); Inoue, J. Lightwave
Technol. 10, 1553 (1992). A product at f_F = f_i + f_j - f_k has output power
P_F = (d/3)^2 eta gamma^2 L_eff^2 P_i P_j P_k exp(-alpha L), with d = 3 when i = j (degenerate)
and d = 6 otherwise (Inoue's degeneracy factor), and Inoue's efficiency eta(alpha, dbeta, L).
Units: gamma 1/(W km), lengths km, alpha 1/km, dbeta 1/km, beta2 ps^2/km, beta3 ps^3/km,
frequency offsets in THz (so 2 pi f is in rad/ps).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from labrun.physics.fibre import Fibre
from labrun.physics.units import C_M_PER_S


def _out(x: np.ndarray) -> float | np.ndarray:
    """Return a float for 0-d results, the array otherwise."""
    return float(x) if np.ndim(x) == 0 else x


def phase_mismatch_per_km(
    pump_wavelength_nm: ArrayLike,
    spacing_ghz: ArrayLike,
    dispersion_ps_per_nm_km: ArrayLike,
    slope_ps_per_nm2_km: ArrayLike = 0.0,
) -> float | np.ndarray:
    """Degenerate mismatch (1/km): dbeta = (2 pi l^2/c) d^2 [D + (l^2/c) d S] (docs/design.md §5.3).

    Inoue's degenerate form; l, D and S are taken at one wavelength (pump_wavelength_nm), d is
    signed. The mismatch is set by D at the degenerate pump; the bracket is D moved along the
    slope to the wave d *below* l in frequency. So: D at the pump with S = 0 gives either first
    sideband; D, S at tone b with d = +delta gives the low sideband 2f_a - f_b (pump a); D, S at
    tone a with d = -delta gives the high sideband 2f_b - f_a (pump b). Vectorised.
    """
    lam = np.asarray(pump_wavelength_nm, dtype=float) * 1e-9
    df = np.asarray(spacing_ghz, dtype=float) * 1e9
    d_si = np.asarray(dispersion_ps_per_nm_km, dtype=float) * 1e-6  # s/m^2
    s_si = np.asarray(slope_ps_per_nm2_km, dtype=float) * 1e3  # s/m^3
    c = C_M_PER_S
    dbeta_per_m = (2.0 * np.pi * lam**2 / c) * df**2 * (d_si + (lam**2 / c) * df * s_si)
    return _out(dbeta_per_m * 1e3)


def dispersion_phase_per_km(
    beta2_ps2_per_km: float, beta3_ps3_per_km: float, offset_thz: ArrayLike
) -> np.ndarray:
    """beta(omega) - beta0 - beta1 omega (1/km) at offsets (THz) from the reference frequency."""
    w = 2.0 * np.pi * np.asarray(offset_thz, dtype=float)  # rad/ps
    return beta2_ps2_per_km * w**2 / 2.0 + beta3_ps3_per_km * w**3 / 6.0


def process_mismatch_per_km(
    beta2_ps2_per_km: float,
    beta3_ps3_per_km: float,
    offset_i_thz: ArrayLike,
    offset_j_thz: ArrayLike,
    offset_k_thz: ArrayLike,
) -> float | np.ndarray:
    """dbeta = beta_i + beta_j - beta_k - beta_F (1/km) for f_F = f_i + f_j - f_k.

    Exact for a cubic beta(omega) (beta2, beta3 at the reference frequency; offsets in THz).
    For f_i = f_j = pump this is -beta2(pump) (2 pi delta)^2, Inoue's degenerate mismatch.
    """
    fi, fj, fk = (np.asarray(v, dtype=float) for v in (offset_i_thz, offset_j_thz, offset_k_thz))

    def beta(f: np.ndarray) -> np.ndarray:
        return dispersion_phase_per_km(beta2_ps2_per_km, beta3_ps3_per_km, f)

    return _out(beta(fi) + beta(fj) - beta(fk) - beta(fi + fj - fk))


def inoue_efficiency(
    alpha_per_km: ArrayLike, dbeta_per_km: ArrayLike, length_km: ArrayLike
) -> float | np.ndarray:
    """Inoue's FWM efficiency (vectorised over dbeta):

    eta = alpha^2/(alpha^2 + dbeta^2) [1 + 4 exp(-alpha L) sin^2(dbeta L/2)/(1 - exp(-alpha L))^2]
    computed as |1 - exp((i dbeta - alpha) L)|^2 / ((alpha^2 + dbeta^2) L_eff^2), which is the same
    expression, stays finite for alpha -> 0 (sinc^2) and equals 1 at dbeta = 0.
    """
    a = np.asarray(alpha_per_km, dtype=float)
    db = np.asarray(dbeta_per_km, dtype=float)
    length = np.asarray(length_km, dtype=float)
    z = (1j * db - a) * length
    with np.errstate(invalid="ignore", divide="ignore"):
        num = np.abs(np.expm1(z)) ** 2 / np.maximum(a**2 + db**2, 1e-300)
        l_eff = np.where(
            a * length > 1e-12, -np.expm1(-a * length) / np.where(a > 0, a, 1.0), length
        )
        eta = num / l_eff**2
    eta = np.where(a**2 + db**2 == 0.0, 1.0, eta)
    return _out(eta)


def inoue_efficiency_nl(
    alpha_per_km: float,
    dbeta_per_km: ArrayLike,
    length_km: float,
    nl_per_km: ArrayLike,
    segments: int = 64,
) -> float | np.ndarray:
    """Inoue's efficiency with the nonlinear (SPM/XPM) phase mismatch of strong tones:

    eta = |int_0^L exp(-alpha z) exp(i [dbeta z + nl (1 - exp(-alpha z))/alpha]) dz|^2 / L_eff^2

    nl = gamma (P_probe - 2 P_pump) at the input for the degenerate product 2 f_pump - f_probe:
    the drive A_pump^2 A_probe* picks up the Kerr phase 3 gamma P_probe per km, the product
    itself 2 gamma (P_pump + P_probe) by cross-phase modulation, both falling with the loss
    (coupled-amplitude equations of Agrawal, Nonlinear Fiber Optics, four-wave-mixing chapter;
    Inoue, J. Lightwave Technol. 10, 1553 (1992) treats this nonlinear mismatch near the
    zero-dispersion wavelength). Equals inoue_efficiency at nl = 0. The integral is summed
    over ``segments`` pieces in each of which the nonlinear phase rate is held at its midpoint
    value (exact integral of each piece); vectorised over dbeta and nl.
    """
    db = np.asarray(dbeta_per_km, dtype=float)
    nl = np.asarray(nl_per_km, dtype=float)
    a, length = float(alpha_per_km), float(length_km)
    if not np.any(nl):
        return inoue_efficiency(a, db, length)
    db, nl = np.broadcast_arrays(db, nl)
    edges = np.linspace(0.0, length, segments + 1)
    z0, h = edges[:-1], edges[1] - edges[0]
    zm = z0 + h / 2.0
    z_eff = (lambda z: -np.expm1(-a * z) / a) if a > 0 else (lambda z: z)
    phase0 = db[..., None] * z0 + nl[..., None] * z_eff(z0)
    rate = db[..., None] + nl[..., None] * np.exp(-a * zm)
    expo = -a + 1j * rate
    with np.errstate(invalid="ignore", divide="ignore"):
        piece = np.where(np.abs(expo) * h > 1e-8, np.expm1(expo * h) / np.where(
            expo == 0, 1.0, expo), h * (1.0 + expo * h / 2.0))
    total = np.sum(np.exp(-a * z0 + 1j * phase0) * piece, axis=-1)
    l_eff = float(z_eff(length))
    eta = np.abs(total) ** 2 / l_eff**2
    return _out(eta)


def degeneracy_power_factor(degenerate: bool) -> float:
    """(d/3)^2 with Inoue's degeneracy factor d = 3 (f_i = f_j) or 6 (f_i != f_j): 1 or 4."""
    return 1.0 if degenerate else 4.0


def small_signal_product_w(
    fibre: Fibre,
    reference_wavelength_nm: float,
    offsets_thz: tuple[float, float, float],
    powers_w: tuple[float, float, float],
) -> float:
    """Output power (W) of the product f_i + f_j - f_k, undepleted pumps (Inoue 1992).

    offsets_thz are (f_i, f_j, f_k) relative to the frequency of reference_wavelength_nm, where
    beta2 and beta3 are taken; degenerate when f_i == f_j.
    """
    fi, fj, fk = offsets_thz
    pi_, pj, pk = powers_w
    b2 = fibre.beta2_at(reference_wavelength_nm)
    b3 = fibre.beta3_at(reference_wavelength_nm)
    dbeta = process_mismatch_per_km(b2, b3, fi, fj, fk)
    eta = inoue_efficiency(fibre.alpha_per_km, dbeta, fibre.length_km)
    g_l = fibre.gamma_per_w_per_km * fibre.effective_length_km
    factor = degeneracy_power_factor(fi == fj)
    return float(
        factor * eta * g_l**2 * pi_ * pj * pk * np.exp(-fibre.alpha_per_km * fibre.length_km)
    )


def sideband_mismatch_per_km(
    fibre: Fibre, wavelength_a_nm: float, spacing_ghz: ArrayLike, side: Literal["low", "high"]
) -> float | np.ndarray:
    """dbeta (1/km) of the first sideband: high 2f_b - f_a (pump b), low 2f_a - f_b (pump a).

    beta2, beta3 from the fibre's D and S at tone a (the same reference the split-step uses).
    """
    d = np.asarray(spacing_ghz, dtype=float) * 1e-3  # THz
    b2, b3 = fibre.beta2_at(wavelength_a_nm), fibre.beta3_at(wavelength_a_nm)
    if side == "high":
        return process_mismatch_per_km(b2, b3, d, d, 0.0)
    if side == "low":
        return process_mismatch_per_km(b2, b3, 0.0, 0.0, d)
    raise ValueError(f"side must be 'low' or 'high', not {side!r}")


def small_signal_sideband_w(
    fibre: Fibre,
    p_a_w: float,
    p_b_w: float,
    wavelength_a_nm: float,
    spacing_ghz: ArrayLike,
    side: Literal["low", "high"] = "high",
) -> float | np.ndarray:
    """First-sideband output power (W): eta gamma^2 L_eff^2 P_b^2 P_a exp(-alpha L) (high side).

    The low side (2f_a - f_b) swaps the roles of the tones. Vectorised over spacing.
    """
    dbeta = sideband_mismatch_per_km(fibre, wavelength_a_nm, spacing_ghz, side)
    eta = np.asarray(inoue_efficiency(fibre.alpha_per_km, dbeta, fibre.length_km))
    pump, probe = (p_b_w, p_a_w) if side == "high" else (p_a_w, p_b_w)
    g_l = fibre.gamma_per_w_per_km * fibre.effective_length_km
    p = eta * g_l**2 * pump**2 * probe * np.exp(-fibre.alpha_per_km * fibre.length_km)
    return _out(p)


def first_null_spacing_ghz(
    wavelength_nm: float, dispersion_ps_per_nm_km: float, length_km: float
) -> float:
    """Spacing of the first lossless efficiency null, dbeta L = 2 pi: sqrt(c / (l^2 D L)).

    From eta = sinc^2(dbeta L/2) with dbeta = (2 pi l^2/c) D delta^2 (slope neglected).
    """
    lam = wavelength_nm * 1e-9
    d_si = abs(dispersion_ps_per_nm_km) * 1e-6
    return float(np.sqrt(C_M_PER_S / (lam**2 * d_si * length_km * 1e3)) * 1e-9)
