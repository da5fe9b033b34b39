"""OSA trace synthesis: lines through a Gaussian RBW filter, floor, ASE and noise.

Model: docs/design.md §5.6 (OSA traces).

An OSA reports power per resolution bandwidth. The RBW filter is modelled as a Gaussian of
FWHM = RBW with unit peak, so a line narrower than the RBW reads its total power at its peak
(common practice: how OSAs are calibrated), and a flat spectral density S reads S x ENBW,
ENBW = sqrt(pi / (4 ln 2)) x FWHM = 1.0645 x FWHM for a Gaussian (mathematics).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from labrun.physics.units import dbm_to_mw, mw_to_dbm

FOUR_LN2 = 4.0 * np.log(2.0)
RBW_CUTOFF = 8.0  # lines are summed out to this many RBWs from their centre
GAUSSIAN_ENBW_PER_FWHM = float(np.sqrt(np.pi / FOUR_LN2))  # 1.0645 (mathematics)


def gaussian_enbw(fwhm: ArrayLike) -> float | np.ndarray:
    """Noise-equivalent bandwidth of a unit-peak Gaussian filter: sqrt(pi/(4 ln 2)) x FWHM."""
    e = GAUSSIAN_ENBW_PER_FWHM * np.asarray(fwhm, dtype=float)
    return float(e) if e.ndim == 0 else e


def rbw_response(offset_nm: ArrayLike, rbw_nm: float) -> np.ndarray:
    """Unit-peak Gaussian RBW filter of FWHM rbw_nm at an offset from its centre."""
    u = np.asarray(offset_nm, dtype=float) / rbw_nm
    return np.exp(-FOUR_LN2 * u * u)


def sample_grid_nm(center_nm: float, span_nm: float, points: int) -> np.ndarray:
    """The OSA's sample grid: points equally spaced over the span, both ends included."""
    if points < 2 or span_nm <= 0:
        raise ValueError("an OSA sweep needs points >= 2 and a positive span")
    return np.linspace(center_nm - span_nm / 2.0, center_nm + span_nm / 2.0, int(points))


def _lines_through_rbw(
    x: np.ndarray, lw: np.ndarray, lp_mw: np.ndarray, rbw: float, negligible_mw: float = 0.0
) -> np.ndarray:
    """Sum of unit-peak Gaussians (mW), vectorised. On an increasing 1-D grid a line is only
    computed out to where it falls below negligible_mw (at most RBW_CUTOFF x RBW, where the
    shape is exp(-4 ln2 x 64) ~ 1e-77)."""
    if lw.size == 0:
        return np.zeros_like(x)
    if x.ndim != 1 or x.size < 2 or np.any(np.diff(x) <= 0):
        return rbw_response(x[..., None] - lw, rbw) @ lp_mw
    reach = np.full(lw.shape, RBW_CUTOFF)
    if negligible_mw > 0:
        with np.errstate(divide="ignore"):
            ratio = np.log(np.maximum(lp_mw, 1e-300) / negligible_mw)
        reach = np.minimum(reach, np.sqrt(np.maximum(ratio, 0.0) / FOUR_LN2))
    lo = np.searchsorted(x, lw - reach * rbw, side="left")
    hi = np.searchsorted(x, lw + reach * rbw, side="right")
    counts = hi - lo
    which = np.repeat(np.arange(lw.size), counts)
    starts = np.repeat(lo - np.concatenate(([0], np.cumsum(counts)[:-1])), counts)
    idx = starts + np.arange(which.size)
    vals = lp_mw[which] * rbw_response(x[idx] - lw[which], rbw)
    return np.bincount(idx, weights=vals, minlength=x.size)


def synthesize_trace(
    x_nm: ArrayLike,
    line_wavelengths_nm: ArrayLike,
    line_powers_dbm: ArrayLike,
    rbw_nm: float,
    *,
    floor_dbm: float | None = -70.0,
    noise_db: float = 0.0,
    sensitivity_dbm: float = -90.0,
    ase_dbm_per_nm: float | None = None,
    rng: np.random.Generator | None = None,
) -> np.ndarray:
    """Displayed trace (dBm per RBW) at x_nm.

    Lines (narrower than the RBW) through the Gaussian RBW shape; plus a flat floor of floor_dbm
    per RBW and flat ASE (ase_dbm_per_nm x ENBW); the floor-plus-ASE part fluctuates with a
    standard deviation of noise_db dB (rng, default seed 0 so traces are reproducible); no
    reading falls below sensitivity_dbm.
    """
    if rbw_nm <= 0:
        raise ValueError("rbw_nm must be > 0")
    x = np.asarray(x_nm, dtype=float)
    lw = np.atleast_1d(np.asarray(line_wavelengths_nm, dtype=float))
    lp = dbm_to_mw(np.atleast_1d(np.asarray(line_powers_dbm, dtype=float)))
    if lw.shape != lp.shape:
        raise ValueError("one power per line wavelength is needed")
    background = 0.0
    if floor_dbm is not None:
        background += float(dbm_to_mw(floor_dbm))
    if ase_dbm_per_nm is not None:
        background += float(dbm_to_mw(ase_dbm_per_nm)) * float(gaussian_enbw(rbw_nm))
    # Contributions below 1e-9 of the lowest possible reading change it by < 5e-9 dB.
    lowest = max(float(dbm_to_mw(sensitivity_dbm)), background * 10.0 ** (-6.0 * noise_db / 10))
    signal = _lines_through_rbw(x, lw, lp, rbw_nm, negligible_mw=1e-9 * lowest)
    noisy: float | np.ndarray = background
    if noise_db > 0 and background > 0:
        rng = rng if rng is not None else np.random.default_rng(0)
        noisy = background * np.power(10.0, noise_db * rng.standard_normal(x.shape) / 10.0)
    y = mw_to_dbm(signal + noisy)
    return np.maximum(y, sensitivity_dbm)
