"""Monte Carlo propagation of a fit's input distributions, as in JCGM 101:2008.

Pure functions, no I/O. The input quantities are those of the GUM budget (labrun.uncertainty):
the launched power of each arm, the OSA's relative amplitude, the lasers' wavelengths, the
spool's length and loss, each drawn from a normal distribution with its stated standard
uncertainty (JCGM 101 6.4.7; the two arms' powers jointly, with a covariance, where the exact
fit has fitted them, 6.4.8). Each trial refits the moved point table and adds a draw of the
fit's statistical (Type A) term from a scaled and shifted t distribution with the fit's
degrees of freedom (6.4.9). The M trial values give the estimate, its standard uncertainty and
the probabilistically symmetric coverage interval (7.7: the (1-p)/2 and (1+p)/2 quantiles).
JCGM 101 7.2.2 suggests M >= 10^4 / (1 - p) trials (2 x 10^5 for 95 %); with fewer, the
interval's ends carry their own Monte Carlo error, which ``McResult.n`` lets a reader judge.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from labrun.fits import LIMIT_PREFIX
from labrun.uncertainty import Uncertainties, spacing_shift_ghz

COVERAGE_P = 0.95
M_RECOMMENDED = int(1e4 / (1 - COVERAGE_P))  # JCGM 101:2008 7.2.2


@dataclass(frozen=True)
class McResult:
    """Monte Carlo summary of one output quantity (JCGM 101:2008 7.6, 7.7)."""

    n: int  # trials that gave a finite value
    mean: float
    std: float
    low: float  # probabilistically symmetric coverage interval, coverage p
    high: float
    p: float = COVERAGE_P

    def to_dict(self) -> dict[str, float | int]:
        """JSON-ready dict."""
        return {"n": self.n, "mean": self.mean, "std": self.std, "low": self.low,
                "high": self.high, "p": self.p}


def coverage_interval(values: np.ndarray, p: float = COVERAGE_P) -> tuple[float, float]:
    """Probabilistically symmetric coverage interval [y_(r), y_(r+q)] of the sorted trial
    values, q = pM rounded to an integer and r = (M - q)/2, rounded up when not an integer
    (JCGM 101:2008 7.7.1, 7.7.2)."""
    v = np.sort(np.asarray(values, dtype=float))
    v = v[np.isfinite(v)]
    m = v.size
    q = int(math.floor(p * m + 0.5))
    if m < 2 or q < 1:
        return float("nan"), float("nan")
    r = max((m - q + 1) // 2, 1)  # (M - q)/2, or the integer part of (M - q + 1)/2
    return float(v[r - 1]), float(v[min(r + q, m) - 1])


def summarise(values: np.ndarray, p: float = COVERAGE_P) -> McResult:
    """Estimate, standard uncertainty and coverage interval of trial values (7.6, 7.7)."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        nan = float("nan")
        return McResult(int(v.size), nan, nan, nan, nan, p)
    lo, hi = coverage_interval(v, p)
    return McResult(int(v.size), float(v.mean()), float(v.std(ddof=1)), lo, hi, p)


def draw_table(t: Mapping[str, np.ndarray], length_km: float, loss_db_per_km: float,
               unc: Uncertainties, rng: np.random.Generator, *, lam_ref: float,
               power_cov: np.ndarray | None = None
               ) -> tuple[dict[str, np.ndarray], float, float]:
    """One trial's point table and spool: every budget input moved by a normal draw.

    ``power_cov``: covariance (dB^2) of the two arms' power offsets; default the bench's
    independent u per arm. The OSA amplitude moves every sideband and sideband limit together
    (one calibration error), each laser's wavelength moves by its own draw (the spacing by
    their difference).
    """
    n = next(iter(t.values())).shape[0]
    t2 = dict(t)
    cov = (np.diag([unc.power_a_db ** 2, unc.power_b_db ** 2]) if power_cov is None
           else np.asarray(power_cov, dtype=float))
    d_pow = rng.multivariate_normal(np.zeros(2), cov) if np.any(cov) else np.zeros(2)
    t2["power_a_dbm"] = t["power_a_dbm"] + d_pow[0]
    t2["power_b_dbm"] = t["power_b_dbm"] + d_pow[1]
    d_osa = rng.normal(0.0, unc.osa_amplitude_db) if unc.osa_amplitude_db > 0 else 0.0
    for k in t:
        if k.startswith(("sideband_", LIMIT_PREFIX + "sideband_")):
            t2[k] = t[k] + d_osa
    if unc.wavelength_pm > 0:
        d_a, d_b = rng.normal(0.0, unc.wavelength_pm, size=2)  # pm, each laser its own
        lam = t.get("wavelength_a_nm", np.full(n, lam_ref))
        lam = np.where(np.isnan(lam), lam_ref, lam)
        if "spacing_ghz" in t:  # f_b - f_a moves by -(c/lambda^2)(d_b - d_a)
            per_pm = spacing_shift_ghz(1.0, lam) / math.sqrt(2.0)
            t2["spacing_ghz"] = t["spacing_ghz"] - per_pm * (d_b - d_a)
        if "wavelength_a_nm" in t:
            t2["wavelength_a_nm"] = t["wavelength_a_nm"] + d_a * 1e-3
    length = length_km * (1.0 + rng.normal(0.0, unc.length_rel)) if unc.length_rel > 0 \
        else length_km
    loss = max(loss_db_per_km + rng.normal(0.0, unc.loss_db_per_km), 0.0) \
        if unc.loss_db_per_km > 0 else loss_db_per_km
    return t2, length, loss


def propagate(fit: Callable[[dict[str, np.ndarray], float, float], Mapping[str, Any]],
              t: Mapping[str, np.ndarray], length_km: float, loss_db_per_km: float,
              unc: Uncertainties, names: Mapping[str, str], n_trials: int, *,
              lam_ref: float = 1550.0, power_cov: np.ndarray | None = None,
              type_a: Mapping[str, tuple[float, int]] | None = None, seed: int = 1,
              p: float = COVERAGE_P, draws: Mapping[str, tuple[float, float]] | None = None
              ) -> dict[str, McResult]:
    """Monte Carlo propagation: ``n_trials`` refits with drawn inputs (JCGM 101:2008 7).

    ``fit(table, length, loss)`` returns results with ``.value``; ``names`` maps each output
    name to the result it is read from. ``type_a``: per output, (standard error, degrees of
    freedom) of the fit's statistical term, added to each trial as a t-distributed draw
    (6.4.9.7). ``draws``: further inputs of the fit, keyword -> (value, standard
    uncertainty), each drawn from its normal distribution per trial (6.4.7) and passed to
    ``fit`` by keyword (a given dispersion D and slope). Seeded: the same seed gives the same
    interval.
    """
    if n_trials < 2:
        raise ValueError("a Monte Carlo propagation needs at least 2 trials")
    rng = np.random.default_rng(seed)
    values = {k: np.full(n_trials, np.nan) for k in names}
    for i in range(n_trials):
        t2, length, loss = draw_table(t, length_km, loss_db_per_km, unc, rng,
                                      lam_ref=lam_ref, power_cov=power_cov)
        drawn = {k: float(rng.normal(v, u)) if u > 0 else v for k, (v, u) in
                 (draws or {}).items()}
        try:
            res = fit(t2, length, loss, **drawn)
        except (ValueError, FloatingPointError, np.linalg.LinAlgError):
            continue  # a trial whose refit fails counts as missing (McResult.n says how many)
        for out, src in names.items():
            r = res.get(src)
            if r is None or not math.isfinite(r.value):
                continue
            stat = 0.0
            if type_a and out in type_a:
                u, dof = type_a[out]
                if math.isfinite(u) and u > 0:
                    stat = u * float(rng.standard_t(max(int(dof), 1)))
            values[out][i] = r.value + stat
    return {k: summarise(v, p) for k, v in values.items()}
