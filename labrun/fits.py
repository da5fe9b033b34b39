"""Fibre parameters from a run's points: gamma, dispersion, power-law slopes, polarisation.

Pure functions (numpy/scipy and labrun.physics, no I/O), usable from a notebook. Physics and line
indexing: docs/design.md §2.1 and §5. Every fit returns a FitResult with value, standard error,
points used, residual RMS, the model's name and the unit; ``extra`` carries fit-specific details
(validity ranges, confidence intervals, points left out and why).

Fits:
- ``gamma_bessel``: each point's first-sideband-to-tone ratio is inverted to the modulation index
  m of the dual-frequency (Bessel) model (Thompson and Roy 1991; Boskovic et al. 1996), for
  unequal tone powers too; then m = gamma * 2 L_eff sqrt(P_a P_b) is regressed across points.
- ``gamma_small_signal``: first sideband against P_a P_b^2 (Inoue 1992), with the efficiency
  correction when D is known (given, or from the dispersion fit).
- ``dispersion`` and ``dispersion_slope``: efficiency against spacing (and pump wavelength),
  bounded nonlinear least squares (scipy.optimize.least_squares), errors from the Jacobian.
- ``slope_<side>_<order>``: sideband power against total launched power, dB/dB, with a 95 %
  confidence interval (Student t).
- ``pol_extinction_db`` (max/min of the first sideband over polarisation states) and
  ``pol_visibility`` (fit to the scalar projection model of docs/design.md §5.5).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np
from scipy import stats
from scipy.optimize import least_squares
from scipy.special import j0, j1

from labrun.physics.fibre import Fibre
from labrun.physics.fwm import inoue_efficiency, inoue_efficiency_nl, sideband_mismatch_per_km
from labrun.physics.polarisation import copolar_fraction, paddles_to_stokes
from labrun.physics.units import alpha_per_km, dbm_to_w, effective_length_km
from labrun.uncertainty import COMPONENTS, Component, Uncertainties, combine, spacing_shift_ghz

DISPERSION_CONVENTION = (
    "|D| at the reference wavelength, ps/(nm km): four-wave mixing measures dbeta^2, so D and "
    "-D (with the slope) give the same data; D > 0 is anomalous dispersion (beta2 < 0)")
SLOPE_CONVENTION = (
    "d|D|/d(lambda) at the reference wavelength, ps/(nm^2 km): the data determine how |D| "
    "changes with wavelength; this is the slope S when D > 0 and -S when D < 0")
SIGNED_D_CONVENTION = (
    "D at the reference wavelength, ps/(nm km), signed: D > 0 is anomalous dispersion "
    "(beta2 < 0); the sign is measured through the SPM/XPM phase mismatch")
SIGNED_S_CONVENTION = "dD/d(lambda) at the reference wavelength, ps/(nm^2 km), signed"
GRID_D_MAX = 30.0  # joint (D, S) grid: |D| of transmission fibres and HNLF (common practice)
GRID_S_MAX = 0.3  # and |S| in ps/(nm^2 km) (common practice); refinement goes beyond
GRID_N_BEST = 12  # candidates refined with the full model (aliases of the oscillation)
SIGN_DCHI2 = 25.0  # the sign of D is reported when the other sign fits worse by this much
LINE_KEY = re.compile(r"^(tone|sideband)_(low|high)_(\d+)$")
DB = 10.0 / math.log(10.0)  # dB per neper of power ratio (10 log10 e)
LIMIT_PREFIX = "limit_"  # column of an undetected line's upper limit (dBm): limit_sideband_high_1
MEASURED_SPACING = "measured_spacing_ghz"  # tone spacing read on the OSA trace (the reduction's)
SET_SPACING = "set_spacing_ghz"  # the setpoint's spacing, kept when the measured one replaces it
SPACING_MEASURED = "spacing_measured"  # 1.0 where spacing_ghz is the measured one, else 0.0
SPACING_AGREE_REL = 0.1  # a measured spacing further than this from the set one is not used


@dataclass(frozen=True)
class FitResult:
    """One fitted parameter: value, standard error, points used, residual RMS, model, unit."""

    value: float
    stderr: float
    n_points: int
    residual_rms: float
    model: str
    unit: str
    extra: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)  # what the fit lacked or assumed
    conventions: str = ""  # sign and frame conventions of the value, in words
    u_combined: float = float("nan")  # combined standard uncertainty (GUM), NaN without budget
    u95: float = float("nan")  # expanded uncertainty, k = 2 (about 95 %)
    budget: list = field(default_factory=list)  # uncertainty.Component rows as dicts

    def to_dict(self) -> dict:
        """JSON-ready dict (NaN becomes None)."""
        d = asdict(self)
        for k in ("value", "stderr", "residual_rms", "u_combined", "u95"):
            d[k] = _finite_or_none(d[k])
        d["extra"] = {k: _finite_or_none(v) if isinstance(v, float) else v
                      for k, v in self.extra.items()}
        d["budget"] = [{k: _finite_or_none(v) if isinstance(v, float) else v
                        for k, v in row.items()} for row in self.budget]
        return d


def _finite_or_none(v: float) -> float | None:
    """float, or None for NaN/inf."""
    return float(v) if v is not None and math.isfinite(v) else None


# ---------------------------------------------------------------------------------------------
# Point table


def points_table(points) -> dict[str, np.ndarray]:
    """Columns as float arrays from a DataFrame or a list of dicts (see fit_run for the names).

    A record's ``lines`` list (line schema of docs/design.md §2.1: kind, side, order,
    power_dbm, detected) is
    flattened into ``<kind>_<side>_<order>`` columns; undetected or missing powers become NaN,
    and an undetected line's upper limit (``upper_limit_dbm``) becomes ``limit_<kind>_...``.
    """
    if isinstance(points, Mapping) and all(isinstance(v, np.ndarray) for v in points.values()):
        return _measured_spacing(dict(points))  # already a table (columns as arrays)
    # A pandas DataFrame is read through its own API, so this module needs no pandas import.
    records = points.to_dict("records") if hasattr(points, "columns") else list(points)
    flat: list[dict] = []
    for rec in records:
        r = {k: v for k, v in dict(rec).items() if k != "lines"}
        for ln in (rec.get("lines") or []) if isinstance(rec, Mapping) else []:
            det = ln.get("detected", True)
            key = f"{ln['kind']}_{ln['side']}_{int(ln['order'])}"
            r[key] = ln.get("power_dbm") if det else None
            if not det and ln.get("upper_limit_dbm") is not None:
                r[LIMIT_PREFIX + key] = ln["upper_limit_dbm"]
        flat.append(r)
    keys: dict[str, None] = {}
    for r in flat:
        keys.update(dict.fromkeys(r))
    table: dict[str, np.ndarray] = {}
    for k in keys:
        vals = [r.get(k) for r in flat]
        if k in ("pol_stokes", "pol_stokes_a", "pol_stokes_b", "pol_angles_deg"):
            table[k] = np.array([_vec3(v) for v in vals], dtype=float).reshape(len(vals), 3)
            continue
        try:
            table[k] = np.array([np.nan if v is None else float(v) for v in vals], dtype=float)
        except (TypeError, ValueError):
            continue  # text columns (labels, keys) are not used by the fits
    return _measured_spacing(table)


def _measured_spacing(t: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """``spacing_ghz`` becomes the spacing measured on the OSA trace where one is given
    (``measured_spacing_ghz``) and within SPACING_AGREE_REL of the set one, the set spacing
    kept as ``set_spacing_ghz`` and each point's choice as ``spacing_measured`` (1.0 or 0.0).

    Why: the lasers' wavelength errors (a pm or so) move the real spacing away from the set
    one (1 pm is 0.125 GHz at 1550 nm); near a null of the phase-matching efficiency that
    shifts the efficiency by dB and biases gamma and D, while the OSA reads the spacing of the
    two tones to a few MHz (both on one wavelength scale, so its absolute error cancels).
    Done once: the measured column is consumed, so a table passed again is left as it is.
    """
    if MEASURED_SPACING not in t:
        return t
    meas = np.abs(t.pop(MEASURED_SPACING))
    n = meas.size
    set_sp = t.get("spacing_ghz", np.full(n, np.nan))
    agree = np.isfinite(meas) & (~np.isfinite(set_sp) | (
        np.abs(meas - np.abs(set_sp)) <= SPACING_AGREE_REL * np.abs(set_sp)))
    sign = np.where(np.isfinite(set_sp) & (set_sp < 0), -1.0, 1.0)
    t[SET_SPACING] = set_sp
    t[SPACING_MEASURED] = agree.astype(float)
    t["spacing_ghz"] = np.where(agree, sign * meas, set_sp)
    return t


def _vec3(v) -> list[float]:
    """A 3-vector or NaNs."""
    if v is None:
        return [np.nan] * 3
    a = [float(x) for x in v]
    return a if len(a) == 3 else [np.nan] * 3


def _col(t: Mapping[str, np.ndarray], name: str, n: int, default: float = np.nan) -> np.ndarray:
    """A column or a constant."""
    return t[name] if name in t else np.full(n, default)


@dataclass(frozen=True)
class PolFrame:
    """How a run's polarisation setpoints map to the tones' relative state (docs/design.md §5.5).

    ``pol_stokes`` is tone b's Stokes vector at the spool input and ``tone_a_stokes`` tone a's,
    in the same frame (the plan's convention: tone a along +s1). ``pol_angles_deg`` are paddle
    angles; they become a Stokes vector only through a declared ``controller`` model
    ("quarter-half-quarter": quarter-, half-, quarter-wave paddles fed with ``input_stokes``).
    A bench file declares this in its [polarisation] table.
    """

    tone_a_stokes: tuple[float, float, float] = (1.0, 0.0, 0.0)
    controller: str | None = None
    input_stokes: tuple[float, float, float] = (1.0, 0.0, 0.0)

    @classmethod
    def from_bench(cls, pol) -> PolFrame:
        """From a bench file's [polarisation] table (labrun.bench.Polarisation)."""
        return cls(tuple(pol.tone_a_stokes), pol.controller, tuple(pol.input_stokes))


CONTROLLERS = ("quarter-half-quarter",)


def copolar_fractions(t: Mapping[str, np.ndarray], n: int,
                      frame: PolFrame | None = None) -> tuple[np.ndarray, list[str]]:
    """Co-polarised fraction (1 + s_a.s_b)/2 per point, and what was assumed or is missing.

    Read from, in order: ``copolar``; ``pol_stokes_a``/``pol_stokes_b``; ``pol_stokes`` (tone
    b, against the frame's tone a); ``pol_angles_deg`` through the frame's controller model.
    Points without polarisation are taken as co-polarised, and the note says so. Paddle angles
    that vary without a controller model leave the fraction unknown (NaN) and say why.
    """
    frame = frame or PolFrame()
    sa_frame = np.asarray(frame.tone_a_stokes, dtype=float)
    notes: list[str]
    if "copolar" in t:
        c, notes = t["copolar"].copy(), []
    elif "pol_stokes_a" in t:
        sb = t["pol_stokes_b"] if "pol_stokes_b" in t else np.tile([1.0, 0.0, 0.0], (n, 1))
        c = _copolar_rows(t["pol_stokes_a"], sb)
        notes = []
    elif "pol_stokes" in t:
        c = _copolar_rows(np.tile(sa_frame, (n, 1)), t["pol_stokes"])
        notes = [f"copolar fraction from pol_stokes (tone b) against tone a at "
                 f"{tuple(float(v) for v in sa_frame)} (bench [polarisation].tone_a_stokes)"]
        gap = np.isnan(c)
        if gap.any() and "pol_angles_deg" in t:  # runs pooled: some recorded paddle angles
            c_ang, ang_notes = _copolar_from_angles(t["pol_angles_deg"][gap], frame)
            c[gap] = c_ang
            notes += ang_notes
            if np.isnan(c).any():
                return c, notes
    elif "pol_angles_deg" in t:
        return _copolar_from_angles(t["pol_angles_deg"], frame)
    else:
        return np.ones(n), ["no polarisation recorded: tones taken as co-polarised"]
    missing = np.isnan(c)
    if missing.any():
        notes.append(f"{int(missing.sum())} point(s) without polarisation taken as co-polarised")
    return np.where(missing, 1.0, c), notes


def _copolar_rows(s_a: np.ndarray, s_b: np.ndarray) -> np.ndarray:
    """(1 + s_a.s_b)/2 row by row (physics.polarisation.copolar_fraction), NaN rows kept."""
    out = np.full(s_a.shape[0], np.nan)
    ok = np.isfinite(s_a).all(axis=1) & np.isfinite(s_b).all(axis=1)
    ok &= (np.linalg.norm(s_a, axis=1) > 0) & (np.linalg.norm(s_b, axis=1) > 0)
    if ok.any():
        out[ok] = copolar_fraction(s_a[ok], s_b[ok])
    return out


def _copolar_from_angles(angles: np.ndarray, frame: PolFrame) -> tuple[np.ndarray, list[str]]:
    """Copolar fraction from paddle angles through the declared controller model."""
    n = angles.shape[0]
    finite = np.isfinite(angles).all(axis=1)
    if frame.controller is None:
        states = np.unique(np.round(angles[finite], 6), axis=0)
        if states.shape[0] <= 1:
            return np.ones(n), ["pol_angles_deg constant and no controller model declared "
                                "(bench [polarisation].controller): tones taken as co-polarised"]
        return np.full(n, np.nan), [
            "refused: pol_angles_deg vary but no controller model is declared (bench "
            "[polarisation].controller = \"quarter-half-quarter\"), so the copolar fraction "
            "of each point is unknown"]
    if frame.controller not in CONTROLLERS:
        return np.full(n, np.nan), [f"refused: unknown controller model {frame.controller!r}; "
                                    f"known: {', '.join(CONTROLLERS)}"]
    sb = np.full((n, 3), np.nan)
    for i in np.flatnonzero(finite):
        sb[i] = paddles_to_stokes(angles[i], frame.input_stokes)
    c = _copolar_rows(np.tile(np.asarray(frame.tone_a_stokes, float), (n, 1)), sb)
    notes = [f"copolar fraction from pol_angles_deg through the {frame.controller} controller "
             f"model (input {tuple(frame.input_stokes)}, tone a {tuple(frame.tone_a_stokes)})"]
    if np.isnan(c).any():
        notes.append(f"{int(np.isnan(c).sum())} point(s) without paddle angles left out")
    return c, notes


# ---------------------------------------------------------------------------------------------
# Bessel (dual-frequency) model: ratio of first sidebands to tones as a function of m


def _dlnr_dm(m: np.ndarray, args: tuple) -> np.ndarray:
    """d ln R / dm of the Bessel ratio, by central differences."""
    h = 1e-4 * np.maximum(m, 1e-3)
    up = np.log(bessel_ratio(m + h, *args))
    down = np.log(bessel_ratio(np.maximum(m - h, 1e-9), *args))
    return (up - down) / (2 * h)


def _unique_branch(m: np.ndarray, x: np.ndarray, m_star: np.ndarray,
                   margin: float = 0.75) -> np.ndarray:
    """Points whose true m lies below the turning point, so their inversion is the right one.

    A ratio alone cannot tell m from its mirror beyond the turning point m*. m grows with
    x = 2 L_eff sqrt(P_a P_b c), so start from the lowest-x third, estimate gamma, keep the
    points predicted below margin * m*, and repeat until the set is stable.
    """
    finite = np.isfinite(m) & (m > 0)
    if finite.sum() < 2:
        return finite
    order = np.argsort(np.where(finite, x, np.inf))
    keep = np.zeros_like(finite)
    keep[order[: max(2, int(finite.sum()) // 3)]] = True
    keep &= finite
    for _ in range(20):
        gamma = float(np.median(m[keep] / x[keep]))
        new = finite & (gamma * x <= margin * m_star)
        if new.sum() < 2 or np.array_equal(new, keep):
            break
        keep = new
    return keep


def _j012(m: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """J0, J1, J2 at m (J2 from the recurrence J2 = 2 J1/m - J0, series near 0)."""
    a, b = j0(m), j1(m)
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(m > 1e-3, 2.0 * b / np.where(m > 1e-3, m, 1.0) - a, m * m / 8.0)
    return a, b, c


def bessel_ratio(m: np.ndarray, rho: np.ndarray, use_low: np.ndarray,
                 use_high: np.ndarray) -> np.ndarray:
    """First-sideband-to-tone power ratio of the Bessel model, P_k ~ P_a J_k^2 + P_b J_(k-1)^2.

    rho = P_b/P_a. With both sides used: (P_-1 + P_2)/(P_0 + P_1), which is
    (J1^2 + J2^2)/(J0^2 + J1^2) for any rho (Boskovic et al.); one side: P_-1/P_0 or P_2/P_1.
    """
    a, b, c = _j012(np.asarray(m, dtype=float))
    a2, b2, c2 = a * a, b * b, c * c
    lo, hi = np.asarray(use_low, dtype=float), np.asarray(use_high, dtype=float)
    num = lo * (b2 + rho * c2) + hi * (c2 + rho * b2)
    den = lo * (a2 + rho * b2) + hi * (b2 + rho * a2)
    return num / den


def unique_limit(rho: np.ndarray, use_low: np.ndarray, use_high: np.ndarray,
                 m_max: float = 8.0, step: float = 0.005) -> np.ndarray:
    """First turning point m* of the ratio: the inversion ratio -> m is unique only below it."""
    rho = np.asarray(rho, dtype=float)
    keys = np.stack([np.round(rho, 9), use_low.astype(float), use_high.astype(float)], axis=1)
    uniq, inv = np.unique(keys, axis=0, return_inverse=True)
    grid = np.arange(step, m_max, step)
    r = bessel_ratio(grid[None, :], uniq[:, :1], uniq[:, 1:2], uniq[:, 2:3])
    falling = np.diff(r, axis=1) <= 0
    first = np.where(falling.any(axis=1), np.argmax(falling, axis=1), grid.size - 1)
    return grid[first][inv.ravel()]


def invert_ratio(ratio: np.ndarray, rho: np.ndarray, use_low: np.ndarray, use_high: np.ndarray,
                 m_hi: np.ndarray, iterations: int = 48) -> np.ndarray:
    """m in [0, m_hi] with bessel_ratio(m) = ratio, by vectorised bisection (NaN if beyond)."""
    lo = np.zeros_like(ratio)
    hi = np.array(m_hi, dtype=float)
    r_hi = bessel_ratio(hi, rho, use_low, use_high)
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        above = bessel_ratio(mid, rho, use_low, use_high) > ratio
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    m = 0.5 * (lo + hi)
    return np.where((ratio > 0) & (ratio <= r_hi), m, np.nan)


def fit_gamma_bessel(p_a_w, p_b_w, low1_w, tone_a_w, tone_b_w, high1_w, l_eff_km: float,
                     copolar=None) -> FitResult | None:
    """gamma from the Bessel model: m_i from each ratio, then m = gamma x_i by weighted LSQ.

    Line powers (W, NaN when not detected) at the spool output or anywhere after it: only
    ratios are used, so path losses cancel. With all four lines the ratio is
    (P_-1 + P_2)/(P_0 + P_1), otherwise one side. x_i = 2 L_eff sqrt(P_a P_b c_i), c_i the
    co-polar fraction. Weights (d ln R/dm)^2 give each point the precision of its ratio.
    """
    p_a, p_b = np.asarray(p_a_w, float), np.asarray(p_b_w, float)
    lo1, ta, tb, hi1 = (np.asarray(v, float) for v in (low1_w, tone_a_w, tone_b_w, high1_w))
    cop = np.ones_like(p_a) if copolar is None else np.asarray(copolar, float)
    use_lo = np.isfinite(lo1) & np.isfinite(ta) & (lo1 > 0) & (ta > 0)
    use_hi = np.isfinite(hi1) & np.isfinite(tb) & (hi1 > 0) & (tb > 0)
    ok = (use_lo | use_hi) & (p_a > 0) & (p_b > 0) & (cop > 0)
    if ok.sum() < 2:
        return None
    p_a, p_b, cop, lo1, ta, tb, hi1, use_lo, use_hi = (
        v[ok] for v in (p_a, p_b, cop, lo1, ta, tb, hi1, use_lo, use_hi))
    rho = p_b / p_a
    z = np.zeros_like(p_a)
    num = np.where(use_lo, lo1, z) + np.where(use_hi, hi1, z)
    den = np.where(use_lo, ta, z) + np.where(use_hi, tb, z)
    ratio = num / den
    m_star = unique_limit(rho, use_lo, use_hi)
    m_all = invert_ratio(ratio, rho, use_lo, use_hi, m_star)
    x_all = 2.0 * l_eff_km * np.sqrt(p_a * p_b * cop)
    good = _unique_branch(m_all, x_all, m_star)
    n_beyond = int((~good).sum())
    if good.sum() < 2:
        return None
    m = m_all[good]
    m_star_used = m_star[good]
    x = x_all[good]
    args = (rho[good], use_lo[good], use_hi[good])
    # Weighted regression m = gamma x; weights (d ln R/dm)^2 at the model's m (iterated), so a
    # noisy m near the turning point does not choose its own weight.
    gamma = float(np.median(m / x))
    for _ in range(4):
        w = _dlnr_dm(np.minimum(gamma * x, 0.999 * m_star[good]), args) ** 2
        gamma = float(np.sum(w * x * m) / np.sum(w * x * x))
    resid = m - gamma * x
    n = m.size
    s2 = float(np.sum(w * resid**2) / max(n - 1, 1))
    stderr = math.sqrt(s2 / float(np.sum(w * x * x)))
    ratio_used = bessel_ratio(m, *args)
    rms_db = float(np.sqrt(np.mean((DB * np.log(bessel_ratio(gamma * x, *args) / ratio_used))
                                   ** 2)))
    return FitResult(
        gamma, stderr, n, rms_db,
        "dual-frequency Bessel: R(m) from P_k ~ P_a J_k(m)^2 + P_b J_(k-1)(m)^2, "
        "m = 2 gamma L_eff sqrt(P_a P_b c)", "1/(W km)",
        {"m_min": float(m.min()), "m_max": float(m.max()),
         "m_unique_max": float(m_star_used.min()),
         "n_beyond_unique": n_beyond,
         "x_max_w_km": float(x.max()),
         "note": "the ratio is monotonic in m only below its first turning point "
                 "(m_unique_max); points whose ratio lies beyond it are left out"},
    )


# ---------------------------------------------------------------------------------------------
# Small-signal FWM (Inoue 1992): gamma and dispersion


def first_sideband_efficiency(spacing_ghz: np.ndarray, wavelength_a_nm: np.ndarray,
                              side: np.ndarray, length_km: float, loss_db_per_km: float,
                              dispersion: float, slope: float,
                              reference_wavelength_nm: float,
                              nl_per_km: np.ndarray | float = 0.0) -> np.ndarray:
    """Inoue efficiency of each point's first sideband for a fibre with D and S at the reference.

    The phase mismatch is the physics module's (beta2, beta3 at tone a from D(lambda), S), plus
    the nonlinear mismatch nl_per_km = gamma (P_probe - 2 P_pump) when given
    (physics.fwm.inoue_efficiency_nl).
    """
    u, v = _mismatch_basis(spacing_ghz, wavelength_a_nm, side, length_km, loss_db_per_km,
                           reference_wavelength_nm)
    alpha = float(alpha_per_km(loss_db_per_km))
    return np.asarray(inoue_efficiency_nl(alpha, dispersion * u + slope * v, length_km,
                                          nl_per_km), dtype=float)


def nl_power_w(p_a_w, p_b_w, side) -> np.ndarray:
    """P_probe - 2 P_pump (W) of a first sideband: high 2f_b - f_a (pump b), low 2f_a - f_b."""
    p_a, p_b = np.asarray(p_a_w, float), np.asarray(p_b_w, float)
    return np.where(np.asarray(side) == "high", p_a - 2.0 * p_b, p_b - 2.0 * p_a)


def fit_gamma_small_signal(p_a_w, p_b_w, ratio, l_eff_km: float, *, eta=None, copolar=None,
                           max_ratio_db: float = -20.0) -> FitResult | None:
    """gamma from first sideband / its pump tone at the output: R = eta c gamma^2 L_eff^2 P_a P_b.

    That is P_F = eta gamma^2 L_eff^2 P_b^2 P_a exp(-alpha L) (docs/design.md §5.3) divided by the
    output pump tone P_b exp(-alpha L), so path losses cancel. Points with R above
    ``max_ratio_db`` are outside the small-signal regime (pump depletion, higher orders) and are
    left out. eta defaults to 1 (no mismatch: spacing well inside the efficiency bandwidth).
    """
    p_a, p_b, r = (np.asarray(v, float) for v in (p_a_w, p_b_w, ratio))
    if callable(eta):
        # eta(gamma): the nonlinear mismatch depends on gamma itself; a few fixed-point passes
        # (the dependence is weak: gamma P L_eff << 1 inside the small-signal cut).
        g = None
        res: FitResult | None = None
        for _ in range(4):
            res = fit_gamma_small_signal(p_a, p_b, r, l_eff_km,
                                         eta=eta(1.0 if g is None else g), copolar=copolar,
                                         max_ratio_db=max_ratio_db)
            if res is None:
                return None
            g = res.value
        if res is not None:
            res.extra["nonlinear_mismatch"] = True
        return res
    eta = np.ones_like(r) if eta is None else np.asarray(eta, float)
    cop = np.ones_like(r) if copolar is None else np.asarray(copolar, float)
    ok = np.isfinite(r) & (r > 0) & (p_a > 0) & (p_b > 0) & (eta > 0) & (cop > 0)
    small = ok & (DB * np.log(np.where(ok, r, 1.0)) <= max_ratio_db)
    n = int(small.sum())
    if n < 2:
        return None
    base = eta[small] * cop[small] * l_eff_km**2 * p_a[small] * p_b[small]
    ln_g = 0.5 * np.log(r[small] / base)
    g = float(np.exp(ln_g.mean()))
    sd = float(ln_g.std(ddof=1)) if n > 1 else float("nan")
    resid_db = 2.0 * DB * (ln_g - ln_g.mean())
    x = np.log10(p_a[small] * p_b[small] * p_b[small])
    slope = float(np.polyfit(x, np.log10(r[small] * p_b[small] / eta[small] / cop[small]), 1)[0]) \
        if np.ptp(x) > 0.1 else float("nan")
    return FitResult(
        g, g * sd / math.sqrt(n), n, float(np.sqrt(np.mean(resid_db**2))),
        "small-signal FWM: P_F = eta gamma^2 L_eff^2 P_b^2 P_a exp(-alpha L) (Inoue 1992), "
        "referenced to the output pump tone; eta with the SPM/XPM phase mismatch when D is "
        "known", "1/(W km)",
        {"n_large_signal": int((ok & ~small).sum()), "max_ratio_db": max_ratio_db,
         "loglog_slope_vs_pa_pb2": slope, "efficiency_corrected": bool(np.any(eta != 1.0))},
    )


def _mismatch_basis(spacing_ghz: np.ndarray, wavelength_a_nm: np.ndarray, side: np.ndarray,
                    length_km: float, loss_db_per_km: float,
                    reference_wavelength_nm: float) -> tuple[np.ndarray, np.ndarray]:
    """(u, v) with dbeta = D u + S v for every point.

    The physics' mismatch is linear in beta2 and beta3, which are linear in D(lambda) and S,
    and D(lambda) = D + S (lambda - lambda_ref) is linear in (D, S): two evaluations give all.
    """
    def dbeta(d: float, s: float) -> np.ndarray:
        fib = Fibre(length_km, loss_db_per_km, 1.0, d, s, reference_wavelength_nm)
        out = np.empty_like(spacing_ghz)
        for lam in np.unique(wavelength_a_nm):
            for sd in ("low", "high"):
                sel = (wavelength_a_nm == lam) & (side == sd)
                if sel.any():
                    out[sel] = sideband_mismatch_per_km(fib, float(lam), spacing_ghz[sel], sd)
        return out

    return dbeta(1.0, 0.0), dbeta(0.0, 1.0)


def _grid_dispersion(y: np.ndarray, u: np.ndarray, alpha: float, length_km: float,
                     d_max: float, n_best: int = 4, max_points: int = 60) -> list[float]:
    """Candidate |D| values: the best local minima of the residual over a grid of D.

    The grid steps the phase at the largest |u| by 0.6 rad (the efficiency oscillates with
    dbeta L) plus a log grid to d_max; gamma is solved in closed form at each D.
    """
    if y.size > max_points:
        pick = np.linspace(0, y.size - 1, max_points).astype(int)
        y, u = y[pick], u[pick]
    phi = float(np.max(np.abs(u))) * length_km
    step = 0.6 / phi if phi > 0 else d_max
    lin = np.arange(0.0, min(d_max, 2000 * step), step)
    grid = np.unique(np.concatenate([lin, np.geomspace(1e-3, d_max, 200)]))
    e = DB * np.log(np.maximum(inoue_efficiency(alpha, grid[:, None] * u[None, :], length_km),
                               1e-300))
    r = y[None, :] - e
    ss = np.sum((r - r.mean(axis=1, keepdims=True)) ** 2, axis=1)
    inner = np.r_[True, ss[1:] < ss[:-1]] & np.r_[ss[:-1] <= ss[1:], True]
    cand = np.flatnonzero(inner)
    cand = cand[np.argsort(ss[cand])][:n_best]
    return [float(grid[i]) for i in cand]


def fit_dispersion(p_a_w, p_b_w, spacing_ghz, wavelength_a_nm, side, ratio, *, length_km: float,
                   loss_db_per_km: float, reference_wavelength_nm: float, copolar=None,
                   fit_slope: bool | None = None, d_max: float = 300.0,
                   s_max: float = 5.0,
                   start: tuple[float, float] | None = None,
                   censored=None, nominal_spacing=None) -> dict[str, FitResult]:
    """D (and slope S) from first-sideband efficiency against spacing: bounded least squares.

    Residuals in dB of R = eta(dbeta(D, S)) c gamma^2 L_eff^2 P_a P_b, free parameters ln gamma,
    D in [0, d_max] and, with two or more pump wavelengths (or fit_slope=True), S. eta depends
    on dbeta^2 only, so the sign of D is not measurable: D is reported >= 0 at the reference
    wavelength (flip the signs of D and S together for normal dispersion). Starts come from a
    grid over D (per wavelength) and, with the slope, a joint grid over (D, S) with gamma
    profiled out, the efficiency being oscillatory (``_joint_grid_starts``); ``start`` = (D, S)
    of a nearby solution replaces the searches by a local refinement (refits of moved inputs).
    Standard errors from the Jacobian at the solution (cov = s^2 (J^T J)^-1).
    ``censored`` marks rows whose ``ratio`` is an upper limit (the line was not detected): their
    residual is one-sided, zero while the model is below the limit and the excess in dB above
    it: a one-sided least-squares penalty, an approximation to the censored-data likelihood of
    J. Tobin, Econometrica 26, 24 (1958), whose censored points carry -log Phi((limit -
    model)/sigma) instead; the two agree only where the model is far above the limit (and
    far below it, where both vanish). The starts and the point count use the detected rows
    only. ``nominal_spacing`` (default ``spacing_ghz``): the set spacings, which count the
    distinct spacings (>= 3 needed) where ``spacing_ghz`` is measured point by point.
    """
    arrs = [np.asarray(v, float) for v in (p_a_w, p_b_w, spacing_ghz, wavelength_a_nm, ratio)]
    p_a, p_b, sp, lam, r = arrs
    side = np.asarray(side)
    cop = np.ones_like(r) if copolar is None else np.asarray(copolar, float)
    cen = np.zeros(r.shape, bool) if censored is None else np.asarray(censored, bool)
    ok = np.isfinite(r) & (r > 0) & np.isfinite(sp) & np.isfinite(lam) & (cop > 0)
    det_ok = ok & ~cen
    nom = sp if nominal_spacing is None else np.asarray(nominal_spacing, float)
    if det_ok.sum() < 4 or np.unique(np.round(np.abs(nom[det_ok]), 6)).size < 3:
        return {}
    p_a, p_b, sp, lam, r, side, cop, cen = (v[ok] for v in (p_a, p_b, sp, lam, r, side, cop,
                                                               cen))
    det = ~cen
    lams = np.unique(lam[det])
    with_slope = (lams.size >= 2) if fit_slope is None else bool(fit_slope)
    alpha = float(alpha_per_km(loss_db_per_km))
    l_eff = effective_length_km(length_km, loss_db_per_km)
    y = DB * np.log(r / (cop * l_eff**2 * p_a * p_b))  # = 10 log10(eta gamma^2)
    u, v = _mismatch_basis(sp, lam, side, length_km, loss_db_per_km, reference_wavelength_nm)
    w_nl = nl_power_w(p_a, p_b, side)  # nonlinear mismatch gamma * w_nl (SPM/XPM)

    def resid(theta: np.ndarray, nl: bool = True) -> np.ndarray:
        s = theta[2] if with_slope else 0.0
        if nl:
            eta = np.asarray(inoue_efficiency_nl(alpha, theta[1] * u + s * v, length_km,
                                                 np.exp(theta[0]) * w_nl))
        else:
            eta = np.asarray(inoue_efficiency(alpha, theta[1] * u + s * v, length_km))
        res = 2.0 * DB * theta[0] + DB * np.log(np.maximum(eta, 1e-300)) - y
        return np.where(cen, np.maximum(res, 0.0), res)  # limits: one-sided

    if start is not None:  # a refit near a known solution: local refinement only
        starts = [(abs(start[0]), float(np.sign(start[0]) or 1.0) * start[1] if with_slope
                   else 0.0)]
    else:
        starts = _dispersion_starts(y[det], u[det], lam[det], lams, alpha, length_km, d_max,
                                    with_slope, reference_wavelength_nm, s_max)
        if with_slope:
            starts += _joint_grid_starts(y[det], u[det], v[det], alpha, length_km,
                                         min(d_max, GRID_D_MAX), min(s_max, GRID_S_MAX))
    # Stage 1, Inoue's linear mismatch (closed form, fast) from every start, D >= 0; stage 2
    # (below) from each stage-1 solution, the best by the full model's cost kept: aliases of
    # the oscillating efficiency can fit the linear mismatch about as well as the truth, the
    # SPM/XPM mismatch tells them apart.
    lins: list[Any] = []  # scipy's OptimizeResults, one per start
    for d0, s0 in starts:
        eta0 = np.asarray(inoue_efficiency(alpha, d0 * u + s0 * v, length_km))
        g0 = float(np.mean((y - DB * np.log(np.maximum(eta0, 1e-300)))[det])) / (2.0 * DB)
        theta0 = [g0, d0] + ([s0] if with_slope else [])
        try_sol = least_squares(resid, theta0, kwargs={"nl": False}, x_scale="jac",
                                bounds=([-np.inf, 0.0] + ([-s_max] if with_slope else []),
                                        [np.inf, d_max] + ([s_max] if with_slope else [])))
        lins.append(try_sol)
    # Stage 2, with the SPM/XPM mismatch: the linear mismatch fixes dbeta^2 only, the small
    # nonlinear term breaks the tie between D and -D (with the slope's sign), so both branches
    # are refined from the linear solution and the better one kept.
    lo = [-np.inf, -d_max] + ([-s_max] if with_slope else [])
    hi = [np.inf, d_max] + ([s_max] if with_slope else [])
    best: dict[bool, Any] = {}
    for lin in _distinct(lins):
        for sign in (1.0, -1.0):
            theta1 = np.array(lin.x, dtype=float)
            theta1[1:] *= sign
            theta1[1] = float(np.clip(theta1[1], -d_max, d_max))
            try_sol = least_squares(resid, theta1, bounds=(lo, hi), x_scale="jac")
            neg = bool(try_sol.x[1] < 0)
            if neg not in best or try_sol.cost < best[neg].cost:
                best[neg] = try_sol
    sol = min(best.values(), key=lambda x: x.cost)
    other = [b.cost for k, b in best.items() if k != bool(sol.x[1] < 0)]
    active = cen & (sol.fun > 0)  # limits the model exceeds: they act as data
    n, p = int(det.sum() + active.sum()), len(sol.x)
    s2 = max(float(np.sum(sol.fun**2)) / max(n - p, 1), 1e-300)
    dchi2 = 2.0 * (other[0] - sol.cost) / s2 if other else 0.0
    signed = dchi2 >= SIGN_DCHI2
    flip = -1.0 if (sol.x[1] < 0 and not signed) else 1.0
    cov = _covariance(sol.jac, sol.fun, n, p)
    rms = float(np.sqrt(np.mean(sol.fun[det | active] ** 2)))
    gamma = float(np.exp(sol.x[0]))
    model = ("Inoue efficiency vs spacing: R = eta(dbeta) gamma^2 L_eff^2 P_a P_b, dbeta from "
             "beta2, beta3 at tone a with D(lambda) = D + S (lambda - lambda_ref), plus the "
             "SPM/XPM mismatch gamma (P_probe - 2 P_pump)")
    extra = {"gamma_per_w_per_km": gamma, "gamma_stderr": gamma * math.sqrt(cov[0, 0]),
             "reference_wavelength_nm": reference_wavelength_nm, "n_wavelengths": int(lams.size),
             "sign_determined": bool(signed),
             "sign_preferred": "negative" if sol.x[1] < 0 else "positive",
             "delta_chi2_other_sign": float(dchi2),
             "n_upper_limits": int(cen.sum()), "n_upper_limits_exceeded": int(active.sum()),
             "at_bound": bool(np.any(sol.active_mask != 0))}
    if signed:
        warn = [f"sign of D set by the SPM/XPM mismatch (the other sign fits worse by "
                f"delta chi^2 = {dchi2:.0f})"]
        conv_d, conv_s = SIGNED_D_CONVENTION, SIGNED_S_CONVENTION
    else:
        warn = [f"the sign of D is not measured (the other sign fits worse by only delta "
                f"chi^2 = {dchi2:.1f} < {SIGN_DCHI2:.0f}): |D| is reported"]
        conv_d, conv_s = DISPERSION_CONVENTION, SLOPE_CONVENTION
    warn += ["at a bound of the search range"] if extra["at_bound"] else []
    out = {"dispersion": FitResult(flip * float(sol.x[1]), math.sqrt(cov[1, 1]), n, rms, model,
                                   "ps/(nm km)", extra, list(warn), conv_d)}
    if with_slope:
        out["dispersion_slope"] = FitResult(flip * float(sol.x[2]), math.sqrt(cov[2, 2]), n, rms,
                                            model, "ps/(nm^2 km)", dict(extra), list(warn),
                                            conv_s)
    return out


def _dispersion_starts(y, u, lam, lams, alpha, length_km, d_max, with_slope, lam_ref,
                       s_max) -> list[tuple[float, float]]:
    """Starting (D, S) pairs: grid minima for one wavelength; for several, a line through the
    per-wavelength |D| with the sign pattern (a zero crossing) that fits best."""
    if not with_slope or lams.size < 2:
        return [(d, 0.0) for d in _grid_dispersion(y, u, alpha, length_km, d_max)]
    d_each = np.array([_grid_dispersion(y[lam == lv], u[lam == lv], alpha, length_km, d_max,
                                        n_best=1)[0] for lv in lams])
    fits = []
    for k in range(lams.size + 1):  # negative below the k-th wavelength: one zero crossing
        signed = np.where(np.arange(lams.size) < k, -d_each, d_each)
        coef = np.polyfit(lams - lam_ref, signed, 1)
        fits.append((float(np.sum((np.polyval(coef, lams - lam_ref) - signed) ** 2)), coef))
    best = min(fits, key=lambda f: f[0])  # the first of equals, as a strict < scan keeps
    s0, d0 = float(best[1][0]), float(best[1][1])
    if d0 < 0:
        d0, s0 = -d0, -s0
    s0 = float(np.clip(s0, -s_max, s_max))
    return [(float(np.clip(d0, 0.0, d_max)), s0), (float(np.median(d_each)), 0.0)]


def _distinct(sols: list[Any], n_best: int = GRID_N_BEST) -> list[Any]:
    """The ``n_best`` lowest-cost least-squares solutions, one per distinct (D, S)."""
    out: list[Any] = []
    for sol in sorted(sols, key=lambda x: x.cost):
        if all(np.max(np.abs(sol.x[1:] - o.x[1:])) > 1e-3 for o in out):
            out.append(sol)
    return out[:n_best]


def _joint_grid_starts(y: np.ndarray, u: np.ndarray, v: np.ndarray, alpha: float,
                       length_km: float, d_max: float, s_max: float,
                       n_best: int = GRID_N_BEST, max_points: int = 60
                       ) -> list[tuple[float, float]]:
    """Starting (D, S) pairs: the best local minima of the linear-mismatch residual over a grid
    of D in [0, d_max] and S in [-s_max, s_max], gamma profiled out (its dB offset is the
    residual's mean). Steps of 0.6 rad in the largest phase dbeta L of each basis; on a long
    spool of large D the efficiency oscillates many times over the spacings and the slope's
    beta3 term shifts every phase, so a per-wavelength grid alone lands on an alias.
    """
    if y.size > max_points:
        pick = np.linspace(0, y.size - 1, max_points).astype(int)
        y, u, v = y[pick], u[pick], v[pick]
    phi_u = float(np.max(np.abs(u))) * length_km
    phi_v = float(np.max(np.abs(v))) * length_km
    d_grid = np.linspace(0.0, d_max, max(int(d_max * phi_u / 0.6), 2) + 1)
    s_grid = np.linspace(-s_max, s_max, max(int(2 * s_max * phi_v / 0.6), 2) + 1)
    a_l = alpha * length_km
    e1, e2 = math.exp(-a_l), math.exp(-2.0 * a_l)
    l_eff2 = effective_length_km(length_km, 0.0 if alpha == 0 else alpha * DB) ** 2
    ss = np.empty((d_grid.size, s_grid.size))
    for j, s in enumerate(s_grid):
        db = d_grid[:, None] * u[None, :] + s * v[None, :]
        # Inoue's efficiency in real form (the expression of physics.fwm.inoue_efficiency):
        # eta = (1 - 2 e^-aL cos(dbeta L) + e^-2aL) / ((a^2 + dbeta^2) L_eff^2)
        num = 1.0 - 2.0 * e1 * np.cos(db * length_km) + e2
        e = DB * (np.log(np.maximum(num, 1e-300)) - np.log((alpha**2 + db**2) * l_eff2))
        r = y[None, :] - e
        ss[:, j] = np.sum((r - r.mean(axis=1, keepdims=True)) ** 2, axis=1)
    from scipy.ndimage import minimum_filter

    local = (ss == minimum_filter(ss, size=3, mode="nearest"))
    idx = np.flatnonzero(local.ravel())
    idx = idx[np.argsort(ss.ravel()[idx])][:n_best]
    di, sj = np.unravel_index(idx, ss.shape)
    return [(float(d_grid[i]), float(s_grid[j])) for i, j in zip(di, sj, strict=True)]


def _covariance(jac: np.ndarray, fun: np.ndarray, n: int, p: int) -> np.ndarray:
    """s^2 (J^T J)^-1 with s^2 = sum r^2/(n - p); pseudo-inverse for rank-deficient cases."""
    s2 = float(np.sum(fun**2)) / max(n - p, 1)
    return np.linalg.pinv(jac.T @ jac) * s2


# ---------------------------------------------------------------------------------------------
# Power-law slopes and polarisation


def fit_power_slope(total_dbm, sideband_dbm, groups, order: int, label: str,
                    confidence: float = 0.95) -> FitResult | None:
    """dB/dB slope of a sideband against total launched power; one intercept per group.

    Groups are points sharing spacing, wavelength, power ratio and polarisation, so a run that
    sweeps several axes still gives one common slope. Expected 2n+1 in the small-signal regime
    (J_n(m) ~ (m/2)^n/n!, docs/design.md §5.2).
    """
    x, y = np.asarray(total_dbm, float), np.asarray(sideband_dbm, float)
    g = np.asarray(groups)
    ok = np.isfinite(x) & np.isfinite(y)
    x, y, g = x[ok], y[ok], g[ok]
    uniq, gi = np.unique(g, return_inverse=True)
    gmax = np.full(uniq.size, -np.inf)
    gmin = np.full(uniq.size, np.inf)
    np.maximum.at(gmax, gi, x)
    np.minimum.at(gmin, gi, x)
    keep = (gmax - gmin >= 0.5) & (np.bincount(gi, minlength=uniq.size) >= 2)
    sel = keep[gi]
    x, y, gi = x[sel], y[sel], gi[sel]
    if x.size < 3:
        return None
    _, gi = np.unique(gi, return_inverse=True)
    ng = int(gi.max()) + 1
    design = np.zeros((x.size, 1 + ng))
    design[:, 0] = x
    design[np.arange(x.size), 1 + gi] = 1.0
    n, p = x.size, 1 + ng
    if n <= p:
        return None
    coef, *_ = np.linalg.lstsq(design, y, rcond=None)
    res = y - design @ coef
    s2 = float(res @ res) / (n - p)
    cov = np.linalg.pinv(design.T @ design) * s2
    se = math.sqrt(cov[0, 0])
    t = float(stats.t.ppf(0.5 + confidence / 2.0, n - p))
    slope = float(coef[0])
    return FitResult(
        slope, se, n, float(np.sqrt(np.mean(res**2))),
        "linear in dB: P_sideband[dBm] = s * P_total[dBm] + b_group", "dB/dB",
        {"line": label, "ci_low": slope - t * se, "ci_high": slope + t * se,
         "confidence": confidence, "expected_small_signal": 2 * order + 1, "n_groups": ng},
    )


def fit_polarisation(sideband_w, copolar, groups, pol_key) -> dict[str, FitResult]:
    """Extinction (max/min, dB) of the first sideband over polarisation states, and a fit of
    the scalar projection model P = A (c + b), c = (1 + s_a.s_b)/2 (docs/design.md §5.5).

    Uses the group (same powers, spacing, wavelength) with the most polarisation states. The
    model's visibility (P(1) - P(0))/(P(1) + P(0)) = 1/(1 + 2b) is 1 for the ideal projection.
    """
    p, c = np.asarray(sideband_w, float), np.asarray(copolar, float)
    g, k = np.asarray(groups), np.asarray(pol_key)
    ok = np.isfinite(p) & (p > 0)
    if not ok.any():
        return {}
    _, gi = np.unique(g, return_inverse=True)
    _, ki = np.unique(k, return_inverse=True)
    pairs = np.unique(np.stack([gi[ok], ki[ok]], axis=1), axis=0)
    states = np.bincount(pairs[:, 0], minlength=int(gi.max()) + 1)
    best_g = int(np.argmax(states))
    best_n = int(states[best_g])
    if best_n < 3:
        return {}
    best = ok & (gi == best_g)
    p, c = p[best], c[best]
    n = int(p.size)
    out: dict[str, FitResult] = {}
    model_note = "scalar projection: P = A (c + b), c = (1 + s_a.s_b)/2"
    fit = None
    if np.ptp(c) > 0.2:
        fit = _projection_fit(p, c)
    ext = DB * math.log(p.max() / p.min())
    sigma = fit[3] if fit else float("nan")
    out["pol_extinction_db"] = FitResult(
        ext, math.sqrt(2.0) * sigma, n, float("nan"), "max/min of the first sideband over "
        "polarisation states", "dB", {"n_states": best_n})
    if fit:
        vis, vis_se, a_w, rms = fit
        out["pol_visibility"] = FitResult(
            vis, vis_se, n, rms, model_note, "1",
            {"scale_w": a_w, "n_states": best_n, "offset_b": (1.0 / vis - 1.0) / 2.0},
            conventions="visibility (P(c=1) - P(c=0))/(P(c=1) + P(c=0)) of the high first "
                        "sideband; 1 for the ideal scalar projection")
    return out


def _projection_fit(p: np.ndarray, c: np.ndarray) -> tuple[float, float, float, float]:
    """(visibility, its stderr, A, residual RMS dB) of P = A (c + b), residuals in dB."""
    y = DB * np.log(p)

    def resid(theta: np.ndarray) -> np.ndarray:
        return DB * (theta[0] + np.log(c + theta[1])) - y

    b0 = max(float(p.min() / p.max()), 1e-6)
    a0 = float(np.log(p.max() / (1.0 + b0)))
    sol = least_squares(resid, [a0, b0], bounds=([-np.inf, 1e-9], [np.inf, 1e6]),
                        x_scale="jac")
    cov = _covariance(sol.jac, sol.fun, p.size, 2)
    b, sb = float(sol.x[1]), math.sqrt(cov[1, 1])
    vis = 1.0 / (1.0 + 2.0 * b)
    return vis, 2.0 * sb * vis**2, float(np.exp(sol.x[0])), float(np.sqrt(np.mean(sol.fun**2)))


# ---------------------------------------------------------------------------------------------
# Entry point


def refused(model: str, unit: str, reason: str, **extra) -> FitResult:
    """A result that could not be fitted: NaN value, the reason as its first warning."""
    return FitResult(float("nan"), float("nan"), 0, float("nan"), model, unit, dict(extra),
                     [f"refused: {reason}"])


def fit_run(points, spool_length_km: float, loss_db_per_km: float, *,
            dispersion_ps_per_nm_km: float | None = None,
            slope_ps_per_nm2_km: float = 0.0,
            reference_wavelength_nm: float = 1550.0,
            max_order: int = 3,
            copolar_min: float = 0.5,
            small_signal_max_ratio_db: float = -20.0,
            bessel_max_mismatch_rad: float = 0.3,
            polarisation: PolFrame | None = None,
            uncertainties: Uncertainties | None = None,
            dispersion_start: tuple[float, float] | None = None) -> dict[str, FitResult]:
    """Every fit the points support, keyed by name (gamma_bessel, gamma_small_signal,
    dispersion, dispersion_slope, slope_<side>_<n>, pol_extinction_db, pol_visibility).

    ``points``: a pandas DataFrame or a list of dicts, one row per point, with
    - ``power_a_dbm``, ``power_b_dbm``: powers launched into the spool (required);
    - ``spacing_ghz`` (f_b - f_a) and ``wavelength_a_nm``: needed for dispersion (the latter
      defaults to ``reference_wavelength_nm``); ``measured_spacing_ghz``, optional: the spacing
      read on the OSA trace, used in place of the set one where it is within 10 % of it
      (``_measured_spacing``: the lasers' wavelength errors move the real spacing);
    - polarisation, optional: ``copolar`` (fraction (1 + s_a.s_b)/2), ``pol_stokes_a`` (and
      ``pol_stokes_b``), ``pol_stokes`` (tone b's state; tone a's from ``polarisation``) or
      ``pol_angles_deg`` (through the controller model of ``polarisation``); absent means
      co-polarised, and every result says so in its warnings;
    - measured line powers in dBm, flat columns ``tone_low_0``, ``tone_high_0``,
      ``sideband_low_<n>``, ``sideband_high_<n>`` (None/NaN when not detected; the keys of
      ``Reduction.powers_by_key()``), or a ``lines`` list of dicts in the docs/design.md schema
      (kind, side, order, power_dbm, detected), as in ``Reduction.to_dict()["lines"]``.
    Line powers may be read anywhere after the spool: only ratios of lines enter the gamma and
    dispersion fits, and the slopes are insensitive to a constant path loss.
    Gamma fits use points with copolar >= ``copolar_min``, each corrected by its co-polar
    fraction (through the measured visibility when the run sweeps polarisation). The Bessel
    fit drops points whose phase mismatch |dbeta| L exceeds ``bessel_max_mismatch_rad`` when
    D is known (given, or fitted here from the spacing dependence). What a fit lacked or assumed
    is in its ``warnings``; a fit that could not be made is returned with a NaN value and the
    reason (``refused``). With ``uncertainties`` every result carries its GUM budget
    (``budget``, ``u_combined``, ``u95``; labrun.uncertainty), at the cost of two refits per
    input quantity (each refining the dispersion locally from the unmoved fit's).
    ``dispersion_start`` = (D, S) of a nearby solution: the dispersion fit refines it locally
    instead of searching (fits.fit_dispersion).
    """
    t = points_table(points)
    kw: dict[str, Any] = {
        "dispersion_ps_per_nm_km": dispersion_ps_per_nm_km,
        "slope_ps_per_nm2_km": slope_ps_per_nm2_km,
        "reference_wavelength_nm": reference_wavelength_nm, "max_order": max_order,
        "copolar_min": copolar_min, "small_signal_max_ratio_db": small_signal_max_ratio_db,
        "bessel_max_mismatch_rad": bessel_max_mismatch_rad, "polarisation": polarisation,
        "dispersion_start": dispersion_start}
    results = _fit_table(t, spool_length_km, loss_db_per_km, **kw)
    if uncertainties is None:
        return results
    kw["dispersion_start"] = dispersion_start or dispersion_of(results)
    return with_budget(results, t, spool_length_km, loss_db_per_km, kw, uncertainties)


def dispersion_of(results: dict[str, FitResult]) -> tuple[float, float] | None:
    """(D, S) of a fit's dispersion result as reported (a start for refits), None without."""
    d = results.get("dispersion")
    if d is None or not math.isfinite(d.value):
        return None
    s = results.get("dispersion_slope")
    return float(d.value), (float(s.value) if s is not None and math.isfinite(s.value) else 0.0)


def _perturbed(t: dict[str, np.ndarray], length_km: float, loss: float, name: str,
               u: float, lam_ref: float) -> tuple[dict[str, np.ndarray], float, float]:
    """The point table and spool with one input quantity moved by u (its unit in COMPONENTS)."""
    t2 = dict(t)
    if name == "power_a_db":
        t2["power_a_dbm"] = t["power_a_dbm"] + u
    elif name == "power_b_db":
        t2["power_b_dbm"] = t["power_b_dbm"] + u
    elif name == "osa_amplitude_db":
        for k in t:
            if k.startswith(("sideband_", LIMIT_PREFIX + "sideband_")):
                t2[k] = t[k] + u
    elif name == "wavelength_pm":
        lam = t.get("wavelength_a_nm", np.full(t["power_a_dbm"].size, lam_ref))
        lam = np.where(np.isnan(lam), lam_ref, lam)
        if "spacing_ghz" in t:
            t2["spacing_ghz"] = t["spacing_ghz"] + np.sign(u) * spacing_shift_ghz(abs(u), lam)
        if "wavelength_a_nm" in t:
            t2["wavelength_a_nm"] = t["wavelength_a_nm"] + u * 1e-3
    elif name == "length_rel":
        length_km *= 1.0 + u
    elif name == "loss_db_per_km":
        loss = max(loss + u, 0.0)
    return t2, length_km, loss


def with_budget(results: dict[str, FitResult], t: dict[str, np.ndarray], length_km: float,
                loss: float, kw: dict, unc: Uncertainties) -> dict[str, FitResult]:
    """Results with their GUM budgets: each input moved by -u and +u, the fit repeated, half
    the change taken as the contribution (labrun.uncertainty); plus the statistical term."""
    rows: dict[str, list[Component]] = {k: [] for k, r in results.items()
                                        if math.isfinite(r.value)}
    for source, name, unit in COMPONENTS:
        u = float(getattr(unc, name))
        moved = []
        for sign in (1.0, -1.0):
            t2, l2, a2 = _perturbed(t, length_km, loss, name, sign * u,
                                    kw["reference_wavelength_nm"])
            moved.append(_fit_table(t2, l2, a2, **kw) if u > 0 else results)
        for key in rows:
            up, down = moved[0].get(key), moved[1].get(key)
            half = (abs(up.value - down.value) / 2.0 if up is not None and down is not None
                    else float("nan"))
            rows[key].append(Component(unc.source(source, name), u, unit, half))
    out = dict(results)
    for key, comps in rows.items():
        r = results[key]
        comps = [Component("statistical (fit)", float("nan"), "", r.stderr), *comps]
        u_c, u95 = combine(comps)
        warn = list(r.warnings)
        if any(not math.isfinite(c.contribution) for c in comps):
            warn.append("a budget component could not be evaluated (the fit failed with that "
                        "input moved): the combined uncertainty leaves it out")
        out[key] = replace(r, u_combined=u_c, u95=u95, budget=[c.to_dict() for c in comps],
                           warnings=warn)
    return out


def _fit_table(t: dict[str, np.ndarray], spool_length_km: float, loss_db_per_km: float, *,
               dispersion_ps_per_nm_km: float | None, slope_ps_per_nm2_km: float,
               reference_wavelength_nm: float, max_order: int, copolar_min: float,
               small_signal_max_ratio_db: float, bessel_max_mismatch_rad: float,
               polarisation: PolFrame | None,
               dispersion_start: tuple[float, float] | None = None) -> dict[str, FitResult]:
    """fit_run on a points_table (see there)."""
    if "power_a_dbm" not in t or "power_b_dbm" not in t:
        raise ValueError("points need power_a_dbm and power_b_dbm columns")
    n = t["power_a_dbm"].size
    p_a, p_b = dbm_to_w(t["power_a_dbm"]), dbm_to_w(t["power_b_dbm"])
    spacing = _col(t, "spacing_ghz", n)
    # The set spacing names a point's group and counts the spacings swept; the measured one
    # (spacing_ghz where the OSA read it, points_table) differs by MHz from point to point.
    nominal = _col(t, SET_SPACING, n)
    nominal = np.where(np.isfinite(nominal), nominal, spacing)
    lam = _col(t, "wavelength_a_nm", n, reference_wavelength_nm)
    lam = np.where(np.isnan(lam), reference_wavelength_nm, lam)
    cop, pol_notes = copolar_fractions(t, n, polarisation)
    known = np.isfinite(cop)
    lines = {k: dbm_to_w(v) for k, v in t.items() if LINE_KEY.match(k)}
    nan = np.full(n, np.nan)
    lo1, hi1 = lines.get("sideband_low_1", nan), lines.get("sideband_high_1", nan)
    ta, tb = lines.get("tone_low_0", nan), lines.get("tone_high_0", nan)
    l_eff = effective_length_km(spool_length_km, loss_db_per_km)
    results: dict[str, FitResult] = {}

    # Polarisation first: its visibility turns each point's copolar fraction into the factor
    # its sidebands actually follow, c_eff = (c + b)/(1 + b) (b = 0 for the ideal projection).
    pol = _polarisation_results(t, n, hi1, cop, known, nominal, lam, pol_notes)
    results.update(pol)
    b_off = pol["pol_visibility"].extra.get("offset_b", 0.0) if "pol_visibility" in pol else 0.0
    b_off = b_off if math.isfinite(b_off) else 0.0
    c_eff = np.where(known, (np.where(known, cop, 0.0) + b_off) / (1.0 + b_off), np.nan)
    co = known & (np.where(known, cop, 0.0) >= copolar_min)
    notes = list(pol_notes)
    if b_off > 0:
        notes.append(f"copolar fraction corrected by the measured visibility "
                     f"{pol['pol_visibility'].value:.4f}")

    # Dispersion first: its D feeds the efficiency correction of the gamma fits.
    side = np.concatenate([np.full(n, "high"), np.full(n, "low")])
    ratio = np.concatenate([hi1 / tb, lo1 / ta])
    # An undetected first sideband enters as an upper limit (one-sided residual).
    lims = {k: dbm_to_w(t[LIMIT_PREFIX + k]) if LIMIT_PREFIX + k in t else nan
            for k in ("sideband_high_1", "sideband_low_1")}
    limit = np.concatenate([lims["sideband_high_1"] / tb, lims["sideband_low_1"] / ta])
    cens = ~np.isfinite(ratio) & np.isfinite(limit)
    ratio = np.where(cens, limit, ratio)
    both = np.concatenate([co, co])
    small = ratio <= 10 ** (small_signal_max_ratio_db / 10)
    sel = both & small & np.isfinite(ratio)
    n_spacings = np.unique(np.round(nominal[np.isfinite(nominal)], 6)).size
    if n_spacings >= 2:
        results.update(fit_dispersion(
            np.tile(p_a, 2)[sel], np.tile(p_b, 2)[sel], np.tile(spacing, 2)[sel],
            np.tile(lam, 2)[sel], side[sel], ratio[sel], length_km=spool_length_km,
            loss_db_per_km=loss_db_per_km, reference_wavelength_nm=reference_wavelength_nm,
            copolar=np.tile(c_eff, 2)[sel], start=dispersion_start, censored=cens[sel],
            nominal_spacing=np.tile(nominal, 2)[sel]))
        if "dispersion" not in results:
            det = sel & ~cens
            results["dispersion"] = refused(
                "Inoue efficiency vs spacing", "ps/(nm km)",
                f"needs >= 4 detected first-sideband ratios <= {small_signal_max_ratio_db} dB "
                f"on >= 3 spacings of co-polarised points; the run has {int(det.sum())} on "
                f"{np.unique(np.round(np.tile(nominal, 2)[det], 6)).size} spacing(s)"
                + (f" (and {int((sel & cens).sum())} upper limit(s) of undetected lines, "
                   "which do not count)" if (sel & cens).any() else ""))
    d_known, s_known, d_source = dispersion_ps_per_nm_km, slope_ps_per_nm2_km, "given"
    if d_known is None and math.isfinite(results.get("dispersion", refused("", "", "")).value):
        d_known, d_source = results["dispersion"].value, "fitted"
        if "dispersion_slope" in results:
            s_known = results["dispersion_slope"].value
    eta_hi = None
    bessel_ok = co.copy()
    gamma_notes = list(notes)
    if d_known is not None and np.isfinite(spacing).all():
        w_hi = nl_power_w(p_a, p_b, "high")

        def eta_hi(g: float, d=d_known, s=s_known, w=w_hi) -> np.ndarray:
            return first_sideband_efficiency(spacing, lam, np.full(n, "high"), spool_length_km,
                                              loss_db_per_km, d, s, reference_wavelength_nm,
                                              g * w)
        u, v = _mismatch_basis(spacing, lam, np.full(n, "high"), spool_length_km,
                               loss_db_per_km, reference_wavelength_nm)
        mism = np.abs(d_known * u + s_known * v)
        bessel_ok &= mism * spool_length_km <= bessel_max_mismatch_rad
    elif d_known is None:
        gamma_notes.append("no dispersion given and none fitted (no spacing dependence): no "
                           "phase-mismatch correction (eta = 1), gamma biased low where "
                           "|dbeta| L is not small")
    else:
        gamma_notes.append("spacing missing on some points: no phase-mismatch correction")
    if not co.any():
        why = ("the copolar fraction is unknown" if not known.any()
               else f"no point with copolar fraction >= {copolar_min}")
        for name in ("gamma_bessel", "gamma_small_signal"):
            results[name] = refused(name, "1/(W km)", why)
            results[name].warnings.extend(gamma_notes)
        _add_slopes(results, t, n, p_a, p_b, nominal, lam, cop, max_order)
        return results

    fb = fit_gamma_bessel(p_a[bessel_ok], p_b[bessel_ok], lo1[bessel_ok], ta[bessel_ok],
                          tb[bessel_ok], hi1[bessel_ok], l_eff, c_eff[bessel_ok])
    if fb is None:
        fb = refused("dual-frequency Bessel", "1/(W km)",
                     "fewer than 2 points with a first sideband inside the unique range of "
                     "the Bessel ratio and within the mismatch limit "
                     f"(|dbeta| L <= {bessel_max_mismatch_rad} rad)")
    fb.extra["n_dispersion_excluded"] = int((co & ~bessel_ok).sum())
    fb.warnings.extend(gamma_notes)
    results["gamma_bessel"] = fb
    eta_co = (lambda g: eta_hi(g)[co]) if eta_hi is not None else None
    fs = fit_gamma_small_signal(p_a[co], p_b[co], (hi1 / tb)[co], l_eff, eta=eta_co,
                                copolar=c_eff[co], max_ratio_db=small_signal_max_ratio_db)
    if fs is None:
        fs = refused("small-signal FWM", "1/(W km)",
                     f"fewer than 2 points with a first-sideband ratio <= "
                     f"{small_signal_max_ratio_db} dB")
    if d_known is not None:
        fs.extra["dispersion_source"] = d_source
    fs.warnings.extend(gamma_notes)
    results["gamma_small_signal"] = fs
    _add_slopes(results, t, n, p_a, p_b, nominal, lam, cop, max_order)
    return results


def _add_slopes(results: dict[str, FitResult], t, n: int, p_a, p_b, spacing, lam, cop,
                max_order: int) -> None:
    """slope_<side>_<order>: dB/dB of each sideband against total launched power."""
    groups = _group_keys(t, n, spacing, lam, cop)
    total_dbm = 10.0 * np.log10((p_a + p_b) * 1e3)
    for s in ("low", "high"):
        for order in range(1, max_order + 1):
            key = f"sideband_{s}_{order}"
            if key in t:
                fr = fit_power_slope(total_dbm, t[key], groups, order, key)
                if fr is not None:
                    results[f"slope_{s}_{order}"] = fr


def _polarisation_results(t, n: int, hi1, cop, known, spacing, lam,
                          notes: list[str]) -> dict[str, FitResult]:
    """pol_extinction_db and pol_visibility, or a refusal when the states cannot be told."""
    pol_key = _pol_keys(t, n, cop)
    varies = np.unique(pol_key).size > 1
    refusal = [x for x in notes if x.startswith("refused:")]
    if refusal and varies:
        reason = refusal[0].removeprefix("refused: ")
        return {"pol_visibility": refused("scalar projection", "1", reason),
                "pol_extinction_db": refused("max/min of the first sideband", "dB", reason)}
    if not known.any():
        return {}
    power_groups = _group_keys(t, n, spacing, lam, None)
    out = fit_polarisation(hi1[known], cop[known], power_groups[known], pol_key[known])
    for r in out.values():
        r.warnings.extend(notes)
    return out


def _group_keys(t, n: int, spacing, lam, cop) -> np.ndarray:
    """A string per point naming its spacing, wavelength, power ratio (and polarisation)."""
    ratio_db = np.round(t["power_a_dbm"] - t["power_b_dbm"], 1)
    parts = [np.round(spacing, 3).astype(str), np.round(lam, 3).astype(str), ratio_db.astype(str)]
    if cop is not None:
        parts.append(np.round(cop, 3).astype(str))
    else:
        parts += [np.round(t["power_a_dbm"], 2).astype(str)]
    out = parts[0]
    for p in parts[1:]:
        out = np.char.add(np.char.add(out, "|"), p)
    return out


def _pol_keys(t, n: int, cop: np.ndarray) -> np.ndarray:
    """A key per point naming its polarisation state (copolar, Stokes or paddle angles)."""
    for name in ("pol_stokes_a", "pol_stokes", "pol_angles_deg"):
        if name in t:
            return np.array(["|".join(f"{v:.4f}" for v in row) for row in t[name]])
    return np.round(cop, 4).astype(str)
