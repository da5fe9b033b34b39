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
from dataclasses import replace
from typing import Any

import numpy as np

from labrun.fits import (
    FitResult,
    PolFrame,
    _copolar,
    _first_sideband_efficiency,
    dispersion_of,
    fit_run,
    nl_power_w,
    points_table,
)
from labrun.lines import grid_ks
from labrun.physics.fibre import Fibre
from labrun.physics.nlse import propagate_tones
from labrun.physics.units import dbm_to_w, effective_length_km
from labrun.uncertainty import Component, Uncertainties, combine

EXACT_MODEL = ("split-step NLSE (docs/design.md §5.4) as forward model: closed-form fit "
               "iterated on data corrected by split-step minus closed-form ratios")
FIT_RTOL = 1e-3  # split-step tolerance inside the fit: lines down to -90 dBc within 0.01 dB
ITERATIONS = 3


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
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Per point: 10 log10(exact / closed-form) of the high and low first-sideband ratios."""
    n = t["power_a_dbm"].size
    p_a, p_b = dbm_to_w(t["power_a_dbm"]), dbm_to_w(t["power_b_dbm"])
    lam = t.get("wavelength_a_nm", np.full(n, lam_ref))
    lam = np.where(np.isnan(lam), lam_ref, lam)
    sp = t["spacing_ghz"]
    ks = grid_ks(2)
    corr_hi, corr_lo = np.zeros(n), np.zeros(n)
    l_eff = effective_length_km(fibre.length_km, fibre.loss_db_per_km)
    g = fibre.gamma_per_w_per_km
    cache: dict[tuple, tuple[float, float]] = {}
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
                eta = _first_sideband_efficiency(
                    np.array([key[1]]), np.array([key[0]]), np.array([side]), fibre.length_km,
                    fibre.loss_db_per_km, fibre.dispersion_ps_per_nm_km,
                    fibre.dispersion_slope_ps_per_nm2_km, lam_ref,
                    g * nl_power_w(key[2], key[3], side))[0]
                closed.append(eta * c * g**2 * l_eff**2 * key[2] * key[3])
            cache[key] = (10 * math.log10(exact_hi / closed[0]),
                          10 * math.log10(exact_lo / closed[1]))
        corr_hi[i], corr_lo[i] = cache[key]
    return corr_hi, corr_lo


def fit_spool(runs_points: Sequence[Any], spool_length_km: float, loss_db_per_km: float, *,
              dispersion_ps_per_nm_km: float | None = None, slope_ps_per_nm2_km: float = 0.0,
              reference_wavelength_nm: float = 1550.0, polarisation: PolFrame | None = None,
              uncertainties: Uncertainties | None = None,
              iterations: int = ITERATIONS) -> dict[str, FitResult]:
    """Fit gamma, D and the slope of one spool from all its runs with the exact model.

    ``runs_points``: one point table per run (DataFrame or list of dicts, as for
    labrun.fits.fit_run), all of the same spool. Returns ``gamma``, ``dispersion`` and
    ``dispersion_slope`` (model: the split-step), plus every closed-form result of fit_run on
    the pooled points under its usual name, whose budget gains the difference to the exact
    model as a "model (closed form vs exact)" component. With ``uncertainties`` every result
    carries its GUM budget (labrun.uncertainty; the exact results' model corrections are held
    fixed while the inputs are moved).
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
    if theta is None or "spacing_ghz" not in t:
        return closed
    cop, _ = _copolar(t, n, polarisation)
    current = closed
    history = [theta]
    for _ in range(iterations):
        fib = Fibre(spool_length_km, loss_db_per_km, theta[0], theta[1], theta[2],
                    reference_wavelength_nm)
        c_hi, c_lo = _corrections(t, cop, fib, reference_wavelength_nm)
        t2 = dict(t)
        if "sideband_high_1" in t:
            t2["sideband_high_1"] = t["sideband_high_1"] - c_hi
        if "sideband_low_1" in t:
            t2["sideband_low_1"] = t["sideband_low_1"] - c_lo
        current = fit_run(t2, spool_length_km, loss_db_per_km, **kw,
                          dispersion_start=dispersion_of(current))
        new = _params(current, dispersion_ps_per_nm_km, slope_ps_per_nm2_km)
        if new is None:
            break
        theta = new
        history.append(theta)
    if uncertainties is not None:
        current = fit_run(t2, spool_length_km, loss_db_per_km, **kw,
                          uncertainties=uncertainties, dispersion_start=dispersion_of(current))
    step = [abs(a - b) for a, b in zip(history[-1], history[-2], strict=True)]
    no_d = dispersion_ps_per_nm_km is None and not math.isfinite(
        closed.get("dispersion", FitResult(float("nan"), 0, 0, 0, "", "")).value)
    out = dict(closed)
    exact_names = {"gamma": "gamma_small_signal", "dispersion": "dispersion",
                   "dispersion_slope": "dispersion_slope"}
    for name, src in exact_names.items():
        r = current.get(src)
        if r is None or not math.isfinite(r.value):
            continue
        extra = dict(r.extra)
        extra.update(iterations=len(history) - 1, last_step=step[list(exact_names).index(name)],
                     closed_form_value=closed[src].value if src in closed else float("nan"))
        warn = list(r.warnings)
        if no_d:
            warn.append("exact model run with D = 0 and no slope: no dispersion given and "
                        "none fitted (add a spacing run of this spool, or give D)")
        out[name] = replace(r, model=EXACT_MODEL, extra=extra, warnings=warn)
    # Model error of each closed-form result: its distance from the exact one.
    for cf, ex in (("gamma_small_signal", "gamma"), ("gamma_bessel", "gamma"),
                   ("dispersion", "dispersion"), ("dispersion_slope", "dispersion_slope")):
        if cf in out and ex in out and math.isfinite(out[cf].value):
            r = out[cf]
            delta = abs(r.value - out[ex].value)
            comps = [Component(**c) for c in r.budget] if r.budget else [
                Component("statistical (fit)", float("nan"), "", r.stderr)]
            comps.append(Component("model (closed form vs exact)", float("nan"), "", delta))
            u_c, u95 = combine(comps)
            out[cf] = replace(r, budget=[c.to_dict() for c in comps], u_combined=u_c, u95=u95)
    return out
