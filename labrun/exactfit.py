"""Exact-model fit of one spool: the split-step solution as the forward model (issue 9).

Pure (numpy/scipy and labrun.physics, no I/O). ``fit_spool`` pools every run of one spool
(power, spacing and polarisation sweeps), fits them with the closed-form models of
labrun.fits as a first estimate, then iterates: at the current gamma, D and slope it computes
each point's first-sideband ratios with the split-step NLSE (physics.nlse, docs/design.md §5.4)
and with the closed-form small-signal model the fits use (Inoue's efficiency with the SPM/XPM
mismatch, §5.3), takes their difference in dB as that point's model correction, removes it
from the measured sidebands and refits. At the fixed point the fitted parameters are those for
which the split-step model reproduces the measured ratios (in the least-squares sense of the
closed-form fits' residuals): a Gauss-Newton iteration whose Jacobian is the closed form's,
which is close to the exact one. The closed-form results are returned too, each with a
"model (closed form vs exact)" line in its budget.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from labrun.fits import (
    LIMIT_PREFIX,
    SPACING_MEASURED,
    FitResult,
    PolFrame,
    copolar_fractions,
    dispersion_of,
    first_sideband_efficiency,
    fit_run,
    nl_power_w,
    points_table,
)
from labrun.lines import grid_ks
from labrun.physics.fibre import Fibre
from labrun.physics.fwm import sideband_mismatch_per_km
from labrun.physics.nlse import propagate_tones
from labrun.physics.units import dbm_to_w, effective_length_km
from labrun.uncertainty import COMPONENTS, READING_NOISE_DB, Component, Uncertainties, combine

EXACT_MODEL = ("split-step NLSE (docs/design.md §5.4) as forward model: closed-form fit "
               "iterated on data corrected by split-step minus closed-form ratios")
OFFSET_MODEL = ("launched-power offset of one arm (nuisance of the exact fit): output tone ratio "
                "b/a against the launched one, and the bench's calibration uncertainty as prior")
OFFSET_CONVENTION = "true launched power = recorded power_<arm>_dbm + offset, dB"
OFFSET_SOURCE = "launched power a, b (fitted)"  # fits the budget table's 28 columns
POWER_FIELDS = ("power_a_db", "power_b_db")
# The common part of the offsets from the tap power meter (the text fits the 28 columns).
OFFSET_SOURCE_TAP = "launched power (tap meter)"
TAP_COLUMN = "tap_launched_total_dbm"  # per point: power meter reading + input_tap_db, dBm
TAP_ITERATIONS = 3  # relinearisations of the tap row (its weights move with the offsets)
DIFF_U_FLOOR_DB = 1e-4  # keeps the offsets' normal matrix well conditioned on noiseless data
FIT_RTOL = 1e-3  # split-step tolerance inside the fit: lines down to -90 dBc within 0.01 dB
ITERATIONS = 3
NO_D_REASON = ("dispersion unknown: no spacing run and no D given, so the phase-mismatch "
               "correction is unknown and gamma may be far off whatever its statistical error")
NO_D_HINT = ("give the spool's dispersion: labrun spool set LABEL --dispersion D --dispersion-u "
             "U (ps/(nm km)), or fit a spacing run of the spool with this run")
MISMATCH_DEPENDENT = ("gamma", "gamma_bessel", "gamma_small_signal")  # values set by eta
# A given D whose effect on gamma is not linear within its uncertainty (JCGM 100:2008 5.1.2
# Note: the first-order propagation holds while the second-order term is small). labrun's
# choice of limit: a second-order term above 0.3 of the first-order one adds more than 4 % to
# u_c by itself and already skews gamma's distribution visibly; beyond it the D row (half the
# change between D + u and D - u) is no longer a standard uncertainty to combine.
LINEARITY_TOL = 0.3
LINEARITY_FLOOR = 1e-4  # relative change of gamma over D +- 2u below which D does not matter
NONLINEAR_D_REASON = ("gamma depends non-linearly on the given D at this spacing (near an "
                      "efficiency null)")
NONLINEAR_D_HINT = ("fit a spacing run jointly, or measure at a smaller spacing (or give D "
                    "with a smaller uncertainty)")
# Birge ratio (reduced chi-square) check of a fit's residuals against the scatter the stated
# inputs explain. Per point: the bench's OSA relative amplitude u (taken as if it varied from
# point to point, which overstates the scatter it makes) and the bench's reading repeatability
# of a line on the OSA (osa_reading_noise_db, default READING_NOISE_DB = 0.1 dB, common practice
# for a grating OSA on lines well above its floor: a few hundredths to 0.1 dB). Warned when the
# reduced chi-square exceeds its 99.9 % point for the fit's degrees of freedom
# (scipy.stats.chi2): with the stated scatter that happens by chance in 1 fit of 1000.
BIRGE_P = 0.999
BIRGE_CHECKED = {"gamma": 1, "gamma_small_signal": 1, "gamma_bessel": 1}  # parameters fitted


def _concat(tables: Sequence[dict[str, np.ndarray]]) -> dict[str, np.ndarray]:
    """One point table from several (columns missing in a run become NaN)."""
    keys: dict[str, None] = {}
    for t in tables:
        keys.update(dict.fromkeys(t))
    out = {}
    for k in keys:
        parts = []
        for t in tables:
            n = next(iter(t.values())).shape[0]
            if k in t:
                parts.append(t[k])
            else:
                shape = (n, 3) if k.startswith("pol_") and k != "pol_key" else (n,)
                parts.append(np.full(shape, np.nan))
        out[k] = np.concatenate(parts, axis=0)
    return out


def _params(res: dict[str, FitResult], d_given: float | None, s_given: float
            ) -> tuple[float, float, float] | None:
    """(gamma, D, S) for the forward model from closed-form results (signed D preferred)."""
    g = res.get("gamma_small_signal")
    if g is None or not math.isfinite(g.value):
        g = res.get("gamma_bessel")
    if g is None or not math.isfinite(g.value):
        return None
    d, s = d_given, s_given
    disp = res.get("dispersion")
    if disp is not None and math.isfinite(disp.value):
        d = disp.value
        slope = res.get("dispersion_slope")
        s = slope.value if slope is not None and math.isfinite(slope.value) else s_given
        if not disp.extra.get("sign_determined") and disp.extra.get("sign_preferred") == \
                "negative":
            d, s = -d, -s  # the closed form's preferred sign, not reported as measured
    return g.value, (0.0 if d is None else d), s


def _corrections(t: dict[str, np.ndarray], cop: np.ndarray, fibre: Fibre, lam_ref: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per point: 10 log10(exact / closed-form) of the high and low first-sideband ratios, and
    the split-step's output tone ratio b/a over the launched one (dB; depletion, near 0)."""
    n = t["power_a_dbm"].size
    p_a, p_b = dbm_to_w(t["power_a_dbm"]), dbm_to_w(t["power_b_dbm"])
    lam = t.get("wavelength_a_nm", np.full(n, lam_ref))
    lam = np.where(np.isnan(lam), lam_ref, lam)
    sp = t["spacing_ghz"]
    ks = grid_ks(2)
    corr_hi, corr_lo, corr_tone = np.zeros(n), np.zeros(n), np.zeros(n)
    l_eff = effective_length_km(fibre.length_km, fibre.loss_db_per_km)
    g = fibre.gamma_per_w_per_km
    cache: dict[tuple, tuple[float, float, float]] = {}
    for i in range(n):
        c = float(np.clip(cop[i], 0.0, 1.0)) if math.isfinite(cop[i]) else 1.0
        if not (math.isfinite(sp[i]) and sp[i] > 0 and c > 0):
            continue
        key = (round(float(lam[i]), 4), round(float(sp[i]), 4), round(float(p_a[i]), 12),
               round(float(p_b[i]), 12), round(c, 4))
        if key not in cache:
            res = propagate_tones(fibre, key[0], key[1], key[2], key[3], 2, copolar=c,
                                  rtol=FIT_RTOL)
            w = res.powers_w
            exact_hi = w[ks.index(2)] / w[ks.index(1)]
            exact_lo = w[ks.index(-1)] / w[ks.index(0)]
            closed = []
            for side in ("high", "low"):
                eta = first_sideband_efficiency(
                    np.array([key[1]]), np.array([key[0]]), np.array([side]), fibre.length_km,
                    fibre.loss_db_per_km, fibre.dispersion_ps_per_nm_km,
                    fibre.dispersion_slope_ps_per_nm2_km, lam_ref,
                    g * nl_power_w(key[2], key[3], side))[0]
                closed.append(eta * c * g**2 * l_eff**2 * key[2] * key[3])
            cache[key] = (10 * math.log10(exact_hi / closed[0]),
                          10 * math.log10(exact_lo / closed[1]),
                          10 * math.log10(w[ks.index(1)] / w[ks.index(0)] * key[2] / key[3]))
        corr_hi[i], corr_lo[i], corr_tone[i] = cache[key]
    return corr_hi, corr_lo, corr_tone


@dataclass(frozen=True)
class PowerOffsets:
    """Fitted launched-power offsets of arms a and b (dB) with their covariance."""

    value: np.ndarray  # (offset a, offset b), dB
    cov: np.ndarray  # 2 x 2, dB^2
    prior_u_db: tuple[float, float]
    diff_db: float = float("nan")  # offset b - offset a measured by the output tone ratio
    diff_u_db: float = float("nan")
    n_tone: int = 0
    tap_db: float = float("nan")  # mean of tap-measured minus recorded total launched power
    tap_u_db: float = float("nan")  # its standard uncertainty (Type A and B)
    n_tap: int = 0  # points whose tap reading entered the fit (0: not used)


def tap_weights(t: dict[str, np.ndarray], value: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per point: the arms' linear shares (w_a, w_b; columns) of the total launched power at the
    offsets ``value``, and that total in dBm (the sum of the arms in mW, not in dB)."""
    p = np.stack([dbm_to_w(t["power_a_dbm"] + value[0]), dbm_to_w(t["power_b_dbm"] + value[1])],
                 axis=1)
    total = p.sum(axis=1)
    return p / total[:, None], 10 * np.log10(total * 1e3)


def _tap_row(t: dict[str, np.ndarray], value: np.ndarray, u_tap_db: float
             ) -> tuple[np.ndarray, float, float, float, int] | None:
    """The tap power meter's row for the offsets, linearised at ``value``: (mean weights,
    right-hand side, mean residual, its standard uncertainty, points), None without >= 2
    readings. Per point the measured total launched power minus the recorded arms moved by
    the offsets is d_i ~ w_a (o_a - v_a) + w_b (o_b - v_b) (first order in dB: d(10 log10
    sum P)/d(offset) = P_arm / sum P); their mean has a Type A scatter term and the stated
    tap uncertainty as a Type B term that does not average down (JCGM 100:2008 5.1.2)."""
    if TAP_COLUMN not in t:
        return None
    ok = np.isfinite(t[TAP_COLUMN]) & np.isfinite(t["power_a_dbm"]) & \
        np.isfinite(t["power_b_dbm"])
    n = int(ok.sum())
    if n < 2:
        return None
    sub = {k: t[k][ok] for k in ("power_a_dbm", "power_b_dbm", TAP_COLUMN)}
    w, model_dbm = tap_weights(sub, value)
    d = sub[TAP_COLUMN] - model_dbm
    mean = float(np.mean(d))
    u = max(math.sqrt(float(np.var(d, ddof=1)) / n + u_tap_db ** 2), DIFF_U_FLOOR_DB)
    wm = w.mean(axis=0)
    return wm, mean + float(wm @ value), mean, u, n


def fit_power_offsets(t: dict[str, np.ndarray], tone_corr_db: np.ndarray, u_a_db: float,
                      u_b_db: float, u_osa_db: float, *, prior: bool = True,
                      u_tap_db: float | None = None) -> PowerOffsets:
    """Launched-power offsets of the two arms by weighted linear least squares.

    Rows: (1) the output tone ratio b/a in dB minus the recorded launched ratio and the
    split-step's own change of that ratio (``tone_corr_db``, depletion) measures offset b -
    offset a; its mean over the points, with a standard uncertainty from the scatter (Type A)
    and the OSA relative amplitude (Type B, not averaged down). (2) With ``u_tap_db`` (the
    bench's stated uncertainty of the tap power measurement) and a ``tap_launched_total_dbm``
    column (the power meter on the input tap, per point): the measured total launched power
    against the recorded arms moved by the offsets, w_a o_a + w_b o_b = P_meas - P_rec (w the
    arms' linear power shares; ``_tap_row``), relinearised at the solution. (3) The prior
    rows offset/u of each arm, u the bench's stated launched-power calibration uncertainty.
    A common offset of both arms cannot be told apart from gamma by any line ratio (the NLSE
    is unchanged under P -> c P, gamma -> gamma / c; Agrawal, Nonlinear Fiber Optics; it
    does change every sideband ratio at fixed gamma), so their sum is held by the tap row
    where there is one, else by the prior alone: without either (``prior=False``, no tap) the
    system is singular. An arm with u = 0 is held at 0.
    """
    u = (float(u_a_db), float(u_b_db))
    free = [i for i in range(2) if u[i] > 0]
    rows: list[list[float]] = []
    rhs: list[float] = []
    diff, diff_u, n_tone = float("nan"), float("nan"), 0
    if {"tone_low_0", "tone_high_0"} <= set(t):
        d = (t["tone_high_0"] - t["tone_low_0"] - (t["power_b_dbm"] - t["power_a_dbm"])
             - tone_corr_db)
        d = d[np.isfinite(d)]
        n_tone = int(d.size)
        if n_tone >= 2:
            diff = float(np.mean(d))
            diff_u = max(math.sqrt(float(np.var(d, ddof=1)) / n_tone + u_osa_db ** 2),
                         DIFF_U_FLOOR_DB)
            rows.append([-1.0 / diff_u, 1.0 / diff_u])
            rhs.append(diff / diff_u)
    if prior:
        for i in free:
            rows.append([1.0 / u[i] if j == i else 0.0 for j in range(2)])
            rhs.append(0.0)
    value, cov = np.zeros(2), np.zeros((2, 2))
    tap = tap_at_zero = None
    for it in range(TAP_ITERATIONS):
        tap = None if u_tap_db is None else _tap_row(t, value, float(u_tap_db))
        if it == 0:
            tap_at_zero = tap  # value is still (0, 0): the raw measured-minus-recorded mean
        all_rows, all_rhs = list(rows), list(rhs)
        if tap is not None:
            all_rows.append(list(tap[0] / tap[3]))
            all_rhs.append(tap[1] / tap[3])
        if not (free and all_rows):
            break
        a = np.asarray(all_rows)[:, free]
        cov_free = np.linalg.inv(a.T @ a)
        value = np.zeros(2)
        value[free] = cov_free @ a.T @ np.asarray(all_rhs)
        cov = np.zeros((2, 2))
        cov[np.ix_(free, free)] = cov_free
        if tap is None:
            break
    tap_db, tap_u, n_tap = float("nan"), float("nan"), 0
    if tap is not None and tap_at_zero is not None:
        tap_db, tap_u, n_tap = tap_at_zero[2], tap[3], tap[4]
    return PowerOffsets(value, cov, u, diff, diff_u, n_tone, tap_db, tap_u, n_tap)


def _shifted(t: dict[str, np.ndarray], offsets: PowerOffsets) -> dict[str, np.ndarray]:
    """The point table with each arm's recorded launched power moved by its fitted offset."""
    t2 = dict(t)
    t2["power_a_dbm"] = t["power_a_dbm"] + offsets.value[0]
    t2["power_b_dbm"] = t["power_b_dbm"] + offsets.value[1]
    return t2


def _tone_residual_rms(t: dict[str, np.ndarray], offsets: PowerOffsets,
                       tone_corr_db: np.ndarray) -> float:
    """RMS (dB) of measured minus modelled output tone ratio b/a at the moved powers."""
    if not {"tone_low_0", "tone_high_0"} <= set(t):
        return float("nan")
    moved = _shifted(t, offsets)
    r = (t["tone_high_0"] - t["tone_low_0"] - (moved["power_b_dbm"] - moved["power_a_dbm"])
         - tone_corr_db)
    r = r[np.isfinite(r)]
    return float(np.sqrt(np.mean(r * r))) if r.size else float("nan")


def _offset_results(offsets: PowerOffsets, residual_rms: float) -> dict[str, FitResult]:
    """power_offset_a and power_offset_b as results (u95 = 2 u: the offsets are near-normal);
    ``residual_rms``: the output tone ratio's residual at the moved powers."""
    out = {}
    for i, arm in enumerate("ab"):
        u = math.sqrt(max(float(offsets.cov[i, i]), 0.0))
        stat = Component("statistical (fit, with the prior)", float("nan"), "", u)
        u_c, u95 = combine([stat])
        out[f"power_offset_{arm}"] = FitResult(
            float(offsets.value[i]), u, offsets.n_tone, residual_rms, OFFSET_MODEL, "dB",
            extra={"prior_u_db": offsets.prior_u_db[i], "tone_ratio_diff_db": offsets.diff_db,
                   "tone_ratio_diff_u_db": offsets.diff_u_db,
                   "correlation_ab": _correlation(offsets.cov),
                   "tap_used": offsets.n_tap > 0, "tap_points": offsets.n_tap,
                   "tap_total_diff_db": offsets.tap_db, "tap_total_u_db": offsets.tap_u_db},
            warnings=([] if offsets.n_tone >= 2 else
                      ["no output tone ratio on >= 2 points: the offset is its prior"]),
            conventions=OFFSET_CONVENTION, u_combined=u_c, u95=u95, budget=[stat.to_dict()])
    return out


def _correlation(cov: np.ndarray) -> float:
    """Correlation coefficient of the two offsets (NaN when one is held at 0)."""
    den = math.sqrt(max(float(cov[0, 0] * cov[1, 1]), 0.0))
    return float(cov[0, 1] / den) if den > 0 else float("nan")


def _offset_budget(results: dict[str, FitResult], t2: dict[str, np.ndarray],
                   offsets: PowerOffsets, refit: Any) -> dict[str, FitResult]:
    """Replace the per-arm launched-power rows by one row for the fitted offsets.

    Sensitivities c_i of each parameter to offset i from refits at +-u_i (u_i the offset's
    posterior standard uncertainty), contribution sqrt(c^T V c) with V the offsets' covariance
    (JCGM 100:2008 5.2.2, correlated inputs); the prior's calibration uncertainty is inside V,
    so the bench's per-arm rows would count it twice and are dropped.
    """
    sens: dict[str, np.ndarray] = {k: np.zeros(2) for k in results}
    for i, col in enumerate(("power_a_dbm", "power_b_dbm")):
        h = math.sqrt(max(float(offsets.cov[i, i]), 0.0))
        if h == 0:
            continue
        moved = []
        for sign in (1.0, -1.0):
            t3 = dict(t2)
            t3[col] = t2[col] + sign * h
            moved.append(refit(t3))
        for k in sens:
            up, down = moved[0].get(k), moved[1].get(k)
            sens[k][i] = ((up.value - down.value) / (2 * h) if up is not None and down is not
                          None else float("nan"))
    drop = {src for src, name, _ in COMPONENTS if name in POWER_FIELDS}
    out = dict(results)
    for k, r in results.items():
        if not r.budget or not math.isfinite(r.value):
            continue
        c = sens[k]
        contrib = math.sqrt(max(float(c @ offsets.cov @ c), 0.0)) if np.isfinite(c).all() \
            else float("nan")
        comps = [Component(**row) for row in r.budget if row["source"] not in drop]
        source = OFFSET_SOURCE_TAP if offsets.n_tap > 0 else OFFSET_SOURCE
        comps.insert(1, Component(source, float("nan"), "", contrib))
        u_c, u95 = combine(comps)
        out[k] = replace(r, budget=[x.to_dict() for x in comps], u_combined=u_c, u95=u95)
    return out


MC_METHOD = ("JCGM 101:2008 Monte Carlo: budget inputs drawn from normal distributions, "
             "closed-form refits of the exact-corrected data, Type A as a t draw")
MC_GIVEN_D = "; the given D (and slope, with its u) drawn too, each refit at the drawn values"


def _monte_carlo(current: dict[str, FitResult], t2: dict[str, np.ndarray], length_km: float,
                 loss: float, kw: dict[str, Any], unc: Uncertainties,
                 power_cov: np.ndarray | None, n: int, seed: int,
                 given: dict[str, tuple[float, float]] | None = None) -> dict[str, Any]:
    """Monte Carlo propagation for the exact results (labrun.montecarlo.propagate); ``given``:
    the given dispersion's inputs (fit_run keyword: (value, standard uncertainty)), drawn."""
    from labrun.montecarlo import propagate

    names = {"gamma": "gamma_small_signal", "dispersion": "dispersion",
             "dispersion_slope": "dispersion_slope"}
    names = {k: v for k, v in names.items() if v in current and math.isfinite(current[v].value)}
    type_a = {k: (current[v].stderr, max(current[v].n_points - 1, 1)) for k, v in names.items()}
    start = dispersion_of(current)
    return propagate(lambda tt, ln, ls, **drawn: fit_run(tt, ln, ls, **{**kw, **drawn},
                                                          dispersion_start=start),
                     t2, length_km, loss, unc, names, n,
                     lam_ref=kw["reference_wavelength_nm"], power_cov=power_cov,
                     type_a=type_a, seed=seed, draws=given)


def fit_spool(runs_points: Sequence[Any], spool_length_km: float, loss_db_per_km: float, *,
              dispersion_ps_per_nm_km: float | None = None, slope_ps_per_nm2_km: float = 0.0,
              reference_wavelength_nm: float = 1550.0, polarisation: PolFrame | None = None,
              uncertainties: Uncertainties | None = None, iterations: int = ITERATIONS,
              power_offsets: bool = True, tap_power: bool = True, monte_carlo: int = 0,
              mc_seed: int = 1, budget: bool = True, dispersion_u_ps_per_nm_km: float = 0.0,
              slope_u_ps_per_nm2_km: float = 0.0) -> dict[str, FitResult]:
    """Fit gamma, D and the slope of one spool from all its runs with the exact model.

    ``runs_points``: one point table per run (DataFrame or list of dicts, as for
    labrun.fits.fit_run), all of the same spool. Returns ``gamma``, ``dispersion`` and
    ``dispersion_slope`` (model: the split-step), plus every closed-form result of fit_run on
    the pooled points under its usual name, whose budget gains the difference to the exact
    model as a "model (closed form vs exact)" component. With ``uncertainties`` every result
    carries its GUM budget (labrun.uncertainty; the exact results' model corrections are held
    fixed while the inputs are moved).
    With ``power_offsets`` the launched power of each arm carries a fitted offset (nuisance
    parameters ``power_offset_a``/``_b`` in the result, fit_power_offsets), its prior the
    bench's calibration uncertainty (``uncertainties``, else the documented defaults); the
    exact results then use the moved powers and their budget has one row for the offsets in
    place of the per-arm calibration rows. With ``tap_power`` and a ``tap_launched_total_dbm``
    column (the input-tap power meter's reading plus the bench's ``input_tap_db``, stored per
    point by the engine) the tap's total launched power is a row of that offsets fit, its
    uncertainty the bench's ``tap_power_u_db``: it fixes the arms' common offset, which the
    line ratios cannot tell from gamma; the offsets' budget row then reads
    OFFSET_SOURCE_TAP, and ``power_offset_a``/``_b`` say ``tap_used`` and ``tap_points``.
    ``monte_carlo`` = M > 0 adds a JCGM 101:2008 Monte Carlo propagation of the budget's inputs
    to the exact results (labrun.montecarlo: M closed-form refits of the exact-corrected data,
    the model corrections held fixed as in the budget; the arms' powers drawn from the fitted
    offsets' covariance): extras ``mc_low``/``mc_high`` (probabilistically symmetric 95 %
    interval), ``mc_mean``, ``mc_std``, ``mc_n``, ``mc_seed``. A given D with
    ``dispersion_u_ps_per_nm_km`` > 0 (and the slope with ``slope_u_ps_per_nm2_km`` > 0) is
    drawn from its normal distribution in each trial and the refit done at the drawn values
    (the split-step corrections, computed at the given D, held fixed as for the other inputs).
    ``budget=False``: no budget even with ``uncertainties`` (which still set the offsets'
    prior): for refits whose value alone is wanted. Every result whose residual is in dB of
    line ratios carries a Birge-ratio check (birge_checked).
    """
    tables = [points_table(p) for p in runs_points]
    if not tables:
        raise ValueError("fit_spool needs the points of at least one run")
    t = _concat(tables)
    n = t["power_a_dbm"].size
    kw: dict[str, Any] = {
        "dispersion_ps_per_nm_km": dispersion_ps_per_nm_km,
        "slope_ps_per_nm2_km": slope_ps_per_nm2_km,
        "reference_wavelength_nm": reference_wavelength_nm, "polarisation": polarisation}
    closed = fit_run(t, spool_length_km, loss_db_per_km, **kw, uncertainties=uncertainties)
    theta = _params(closed, dispersion_ps_per_nm_km, slope_ps_per_nm2_km)
    no_d = dispersion_ps_per_nm_km is None and dispersion_of(closed) is None
    unc = uncertainties or Uncertainties()
    if theta is None or "spacing_ghz" not in t:
        closed = birge_checked(closed, unc.osa_amplitude_db, unc.reading_noise_db)
        return without_u(closed, NO_D_REASON) if no_d else closed
    cop, _ = copolar_fractions(t, n, polarisation)
    current = closed
    history = [theta]
    u_arms = (unc.power_a_db, unc.power_b_db) if power_offsets else (0.0, 0.0)
    u_tap = unc.tap_power_db if tap_power else None
    offsets = fit_power_offsets(t, np.zeros(n), 0.0, 0.0, unc.osa_amplitude_db)
    for _ in range(iterations):
        fib = Fibre(spool_length_km, loss_db_per_km, theta[0], theta[1], theta[2],
                    reference_wavelength_nm)
        c_hi, c_lo, c_tone = _corrections(_shifted(t, offsets), cop, fib,
                                          reference_wavelength_nm)
        offsets = fit_power_offsets(t, c_tone, *u_arms, unc.osa_amplitude_db, u_tap_db=u_tap)
        t2 = _shifted(t, offsets)
        for key, corr in (("sideband_high_1", c_hi), ("sideband_low_1", c_lo)):
            for col in (key, LIMIT_PREFIX + key):  # an upper limit moves with its line
                if col in t:
                    t2[col] = t[col] - corr
        current = fit_run(t2, spool_length_km, loss_db_per_km, **kw,
                          dispersion_start=dispersion_of(current))
        new = _params(current, dispersion_ps_per_nm_km, slope_ps_per_nm2_km)
        if new is None:
            break
        theta = new
        history.append(theta)
    if uncertainties is not None and budget:
        start = dispersion_of(current)
        if power_offsets:
            unc_lines = replace(uncertainties, power_a_db=0.0, power_b_db=0.0)
            current = fit_run(t2, spool_length_km, loss_db_per_km, **kw,
                              uncertainties=unc_lines, dispersion_start=start)
            current = _offset_budget(current, t2, offsets, lambda tt: fit_run(
                tt, spool_length_km, loss_db_per_km, **kw, dispersion_start=start))
        else:
            current = fit_run(t2, spool_length_km, loss_db_per_km, **kw,
                              uncertainties=uncertainties, dispersion_start=start)
    mc = {}
    given = {}
    if dispersion_ps_per_nm_km is not None:
        if dispersion_u_ps_per_nm_km > 0:
            given["dispersion_ps_per_nm_km"] = (dispersion_ps_per_nm_km,
                                                dispersion_u_ps_per_nm_km)
        if slope_u_ps_per_nm2_km > 0:
            given["slope_ps_per_nm2_km"] = (slope_ps_per_nm2_km, slope_u_ps_per_nm2_km)
    if monte_carlo > 0:
        mc = _monte_carlo(current, t2, spool_length_km, loss_db_per_km, kw, unc,
                          offsets.cov if power_offsets else None, monte_carlo, mc_seed, given)
    step = [abs(a - b) for a, b in zip(history[-1], history[-2], strict=True)]
    # points whose spacing is the one read on the OSA (fits.points_table), not the set one
    n_measured = int(np.nansum(t.get(SPACING_MEASURED, np.zeros(n))))
    out = dict(closed)
    exact_names = {"gamma": "gamma_small_signal", "dispersion": "dispersion",
                   "dispersion_slope": "dispersion_slope"}
    for name, src in exact_names.items():
        r = current.get(src)
        if r is None or not math.isfinite(r.value):
            continue
        extra = dict(r.extra)
        extra.update(iterations=len(history) - 1, last_step=step[list(exact_names).index(name)],
                     closed_form_value=closed[src].value if src in closed else float("nan"),
                     n_spacing_measured=n_measured)
        if name in mc:
            extra.update({f"mc_{k}": v for k, v in mc[name].to_dict().items()},
                         mc_seed=mc_seed,
                         mc_method=MC_METHOD + (MC_GIVEN_D if given else ""))
        warn = list(r.warnings)
        if no_d:
            warn.append("exact model run with D = 0 and no slope: no dispersion given and "
                        "none fitted (add a spacing run of this spool, or give D)")
        out[name] = replace(r, model=EXACT_MODEL, extra=extra, warnings=warn)
    if power_offsets:
        out.update(_offset_results(offsets, _tone_residual_rms(t, offsets, c_tone)))
        if uncertainties is None:
            for arm in "ab":
                out[f"power_offset_{arm}"].warnings.append(
                    "prior: the documented default calibration uncertainty (no bench "
                    "calibration given)")
    # Model error of each closed-form gamma: its distance from the exact one. (The closed-form
    # D and slope share their names with the exact results, which replace them; their values
    # stay in the exact results' extra "closed_form_value".)
    for cf, ex in (("gamma_small_signal", "gamma"), ("gamma_bessel", "gamma")):
        if cf in out and ex in out and math.isfinite(out[cf].value):
            r = out[cf]
            delta = abs(r.value - out[ex].value)
            comps = [Component(**c) for c in r.budget] if r.budget else [
                Component("statistical (fit)", float("nan"), "", r.stderr)]
            comps.append(Component("model (closed form vs exact)", float("nan"), "", delta))
            u_c, u95 = combine(comps)
            out[cf] = replace(r, budget=[c.to_dict() for c in comps], u_combined=u_c, u95=u95)
    out = birge_checked(out, unc.osa_amplitude_db, unc.reading_noise_db)
    return without_u(out, NO_D_REASON) if no_d else out


def nonlinearity(values: Sequence[float]) -> float:
    """How far a value's change with one input is from linear, from its values at x - 2u,
    x - u, x, x + u, x + 2u: the ratio of the second-order to the first-order term of the
    propagated uncertainty (JCGM 100:2008 5.1.2 Note: u_c^2 = (f' u)^2 + (f'' u^2)^2 / 2 for a
    normal input), the larger of its estimates on the u and the 2u stencils; inf where the
    values do not move one way (a peak or a dip inside x +- 2u), 0 where they hardly move."""
    gm2, gm1, g0, gp1, gp2 = (float(v) for v in values)
    g = np.array([gm2, gm1, g0, gp1, gp2])
    if not np.isfinite(g).all():
        return math.inf
    floor = LINEARITY_FLOOR * abs(g0)
    if float(np.ptp(g)) <= floor:
        return 0.0
    steps = np.diff(g)  # a step counts when above the floor and 5 % of the range (fit noise)
    signs = {bool(d > 0) for d in steps if abs(d) > max(floor, 0.05 * float(np.ptp(g)))}
    if len(signs) > 1:
        return math.inf
    r1 = math.sqrt(2.0) * abs(gp1 - 2 * g0 + gm1) / abs(gp1 - gm1) if gp1 != gm1 else math.inf
    r2 = math.sqrt(0.5) * abs(gp2 - 2 * g0 + gm2) / abs(gp2 - gm2) if gp2 != gm2 else math.inf
    return max(r1, r2)


def mismatch_null(runs_points: Sequence[Any], length_km: float, loss_db_per_km: float,
                  d: float, u: float, slope: float, reference_wavelength_nm: float
                  ) -> dict[str, float] | None:
    """The linear phase mismatch |dbeta| L of the high first sideband (rad) at the given D and
    over D +- 2u, and the first efficiency null 2 pi n (n >= 1) inside that range, None when
    the range holds none. Inoue's efficiency with loss, eta = a^2/(a^2 + dbeta^2) [1 + 4
    exp(-a L) sin^2(dbeta L / 2) / (1 - exp(-a L))^2] (Inoue, J. Lightwave Technol. 10, 1553
    (1992)), has its minima near dbeta L = 2 pi n: crossing one, gamma(D) has a peak."""
    t = _concat([points_table(p) for p in runs_points])
    if "spacing_ghz" not in t:
        return None
    n = t["power_a_dbm"].size
    lam = t.get("wavelength_a_nm", np.full(n, reference_wavelength_nm))
    lam = np.where(np.isnan(lam), reference_wavelength_nm, lam)
    ok = np.isfinite(t["spacing_ghz"])
    if not ok.any():
        return None

    def dbeta(d_x: float) -> np.ndarray:  # per km, high first sideband, each point
        fib = Fibre(length_km, loss_db_per_km, 1.0, d_x, slope, reference_wavelength_nm)
        return np.concatenate([sideband_mismatch_per_km(fib, float(lm), t["spacing_ghz"][
            ok & (lam == lm)], "high") for lm in np.unique(lam[ok])])

    at = np.abs(dbeta(d)) * length_km
    lo_end, hi_end = dbeta(d - 2 * u), dbeta(d + 2 * u)  # dbeta is linear in D
    crosses_zero = np.sign(lo_end) != np.sign(hi_end)
    low = np.where(crosses_zero, 0.0, np.minimum(np.abs(lo_end), np.abs(hi_end))) * length_km
    high = np.maximum(np.abs(lo_end), np.abs(hi_end)) * length_km
    k = np.maximum(np.ceil(low / (2 * math.pi)), 1.0)  # each point's first null at or above
    inside = 2 * math.pi * k <= high
    if not inside.any():
        return None
    first = int(np.argmax(inside))
    return {"mismatch_rad_min": float(at.min()), "mismatch_rad_max": float(at.max()),
            "range_low_rad": float(low[first]), "range_high_rad": float(high[first]),
            "null_rad": float(2 * math.pi * k[first]), "null_order": float(k[first]),
            "points_near_null": float(inside.sum())}


def birge_checked(results: dict[str, FitResult], u_osa_db: float,
                  reading_noise_db: float = READING_NOISE_DB) -> dict[str, FitResult]:
    """The results with a Birge-ratio check of their residuals (in dB of line ratios): the
    reduced chi-square sum(r^2) / ((n - p) sigma^2), sigma^2 = u_osa^2 + reading_noise_db^2
    (the bench's osa_reading_noise_db) the per-point scatter the stated inputs explain; above
    its BIRGE_P point (scipy.stats.chi2, n - p degrees of freedom) the result is warned, and
    ``extra["birge_ratio"]`` (sqrt of the reduced chi-square) is kept either way."""
    from scipy.stats import chi2

    sigma = math.hypot(float(u_osa_db), float(reading_noise_db))
    n_disp = 3 if "dispersion_slope" in results else 2
    out = dict(results)
    for name, r in results.items():
        p = BIRGE_CHECKED.get(name, n_disp if name in ("dispersion", "dispersion_slope")
                              else None)
        if p is None or not (math.isfinite(r.value) and math.isfinite(r.residual_rms)):
            continue
        dof = int(r.n_points) - p
        if dof < 1:
            continue
        red = r.residual_rms ** 2 * r.n_points / (dof * sigma ** 2)
        limit = float(chi2.ppf(BIRGE_P, dof)) / dof
        extra = {**r.extra, "birge_ratio": math.sqrt(red),
                 "birge_limit": math.sqrt(limit)}
        warn = list(r.warnings)
        if red > limit:
            warn.append(
                f"residual rms {r.residual_rms:.3g} dB is far above what the inputs explain: "
                f"Birge ratio {math.sqrt(red):.3g} (reduced chi-square {red:.3g} on {dof} "
                f"degrees of freedom, per-point sigma {sigma:.3g} dB from the OSA relative "
                f"amplitude u {u_osa_db:g} dB and a reading noise of {reading_noise_db:g} dB) "
                f"above {math.sqrt(limit):.3g} (chi-square {BIRGE_P:.1%} point): the model does "
                "not describe the data (a wrong given D, a null of the efficiency, an unstable "
                "set-up)")
        out[name] = replace(r, extra=extra, warnings=warn)
    return out


def without_u(results: dict[str, FitResult], reason: str, hint: str = NO_D_HINT
              ) -> dict[str, FitResult]:
    """The results with no uncertainty claimed for the values the phase-mismatch correction
    sets (MISMATCH_DEPENDENT): u_combined, u95, budget and Monte Carlo interval dropped, the
    reason in ``extra["no_u_reason"]`` and ``extra["no_u_hint"]`` (issue 9: no silent fallback;
    a statistical error alone would claim a precision the value does not have)."""
    out = dict(results)
    for name in MISMATCH_DEPENDENT:
        r = results.get(name)
        if r is None or not math.isfinite(r.value):
            continue
        extra = {k: v for k, v in r.extra.items() if not k.startswith("mc_")}
        extra.update(no_u_reason=reason, no_u_hint=hint)
        out[name] = replace(r, u_combined=float("nan"), u95=float("nan"), budget=[],
                            extra=extra)
    return out
