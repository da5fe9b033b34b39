"""Spools side by side, and one spool's history: values from stored fits, with uncertainties.

``compare_spools`` gives each spool's headline parameters (gamma, D, dispersion slope, loss,
effective length, first-sideband efficiency at common conditions), each as {value, stderr, u95,
unit, model, runs}. D and its slope are shown as ``labrun fit`` shows them: signed where the fit
determined the sign of D, else |D| and d|D|/d(lambda) (``sign_determined`` says which).
``spool_history`` lists every stored fit of one spool in time order and flags a value that
differs from the previous comparable value of the same quantity (fits that claim no U skipped)
by more than their combined expanded uncertainty (sqrt(U1^2 + U2^2), GUM-style comparison of
two results). Reads stored fits only: the time does
not grow with the number of stored lines.
"""

from __future__ import annotations

import math
from datetime import datetime
from typing import Any

from labrun.errors import InputError
from labrun.store import Store

# Common conditions of the first-sideband efficiency (invented, typical of the shipped sweeps).
COMMON = {"spacing_ghz": 50.0, "power_dbm": 0.0, "wavelength_nm": 1550.0}
GAMMA = ("gamma", "gamma_bessel", "gamma_small_signal")  # preferred order (exact model first)
HISTORY_PARAMS = ("gamma_per_w_per_km", "dispersion_ps_per_nm_km",
                  "dispersion_slope_ps_per_nm2_km")


def _iso(when: datetime | None) -> str | None:
    """ISO 8601 text of a stored time (None for a record not stored yet)."""
    return when.isoformat() if when is not None else None


def _param(record: Any, names: tuple[str, ...]) -> tuple[str, Any] | None:
    """(name, ParameterRecord) of the first of ``names`` the fit has a value for."""
    for name in names:
        p = record.parameters.get(name)
        if p is not None and p.value is not None:
            return name, p
    return None


def sign_determined(p: Any) -> bool:
    """Whether the fit determined the sign of D (its extra ``sign_determined``, set by
    labrun.fits.fit_dispersion); a fit without the key reported |D|."""
    return bool((p.extra or {}).get("sign_determined"))


def _entry(value: float | None, unit: str, model: str, runs: list[int], *,
           stderr: float | None = None, u95: float | None = None,
           u95_kind: str | None = None, no_u_reason: str | None = None) -> dict[str, Any]:
    """One compared quantity as JSON (``u95_kind``: what u95 is, as ParameterRecord says;
    ``no_u_reason``: why a value claims no uncertainty, which makes it not comparable)."""
    out = {"value": value, "stderr": stderr, "u95": u95, "u95_kind": u95_kind, "unit": unit,
           "model": model, "runs": runs}
    if no_u_reason:
        out.update(comparable=False, no_u_reason=no_u_reason)
    return out


def headline_values(record: Any, spool: Any) -> dict[str, Any]:
    """Headline quantities of one fit of one spool (spool: its stored row or snapshot dict)."""
    get = spool.get if isinstance(spool, dict) else lambda k: getattr(spool, k, None)
    length, loss = get("length_km"), get("loss_db_per_km")
    runs = list(record.run_ids)
    out: dict[str, Any] = {}
    gamma = _param(record, GAMMA)
    if gamma:
        name, p = gamma
        out["gamma_per_w_per_km"] = _entry(p.value, p.unit, p.model, runs, stderr=p.stderr,
                                           u95=p.u95, u95_kind=p.u95_kind(),
                                           no_u_reason=p.extra.get("no_u_reason")
                                           ) | {"parameter": name}
    disp = _param(record, ("dispersion",))
    if disp:
        p = disp[1]
        signed = sign_determined(p)
        out["dispersion_ps_per_nm_km"] = _entry(
            p.value if signed else abs(p.value), p.unit, p.model, runs, stderr=p.stderr,
            u95=p.u95, u95_kind=p.u95_kind()) | {"sign_determined": signed}
    slope = _param(record, ("dispersion_slope",))
    if slope:
        p = slope[1]
        out["dispersion_slope_ps_per_nm2_km"] = _entry(
            p.value, p.unit, p.model, runs, stderr=p.stderr, u95=p.u95,
            u95_kind=p.u95_kind()) | {"sign_determined": sign_determined(p)}
    if loss is not None:
        out["loss_db_per_km"] = _entry(loss, "dB/km", "nominal, from the spool record", [])
    if length is not None and loss is not None:
        from labrun.physics.units import effective_length_km

        out["effective_length_km"] = _entry(
            effective_length_km(length, loss), "km",
            "L_eff = (1 - exp(-alpha L)) / alpha from the recorded length and loss", [])
        if gamma:
            out["first_sideband_efficiency_db"] = _efficiency(gamma[1], disp, slope, length,
                                                              loss, runs)
    return out


def _efficiency(gamma: Any, disp: Any, slope: Any, length: float, loss: float,
                runs: list[int]) -> dict[str, Any]:
    """First upper sideband over the output pump tone at COMMON conditions (Inoue small signal).

    10 log10(eta gamma^2 L_eff^2 P_a P_b); its standard uncertainty from gamma's alone
    (20 log10(e) u(gamma)/gamma, the power of 2 on gamma); D the fitted one, else the one the
    fit used from the spool record, else 0 (and then, like gamma, not comparable).
    """
    from labrun.physics.fibre import Fibre
    from labrun.physics.fwm import small_signal_sideband_w
    from labrun.physics.units import dbm_to_w

    used = gamma.extra.get("dispersion_used_ps_per_nm_km")
    d_text = ("fitted" if disp else "from the spool record" if used is not None
              else "0 (not fitted)")
    d_value = disp[1].value if disp else (used or 0.0)
    s_value = (slope[1].value if slope else 0.0 if disp
               else gamma.extra.get("slope_used_ps_per_nm2_km") or 0.0)
    fibre = Fibre(length_km=length, loss_db_per_km=loss, gamma_per_w_per_km=gamma.value,
                  dispersion_ps_per_nm_km=d_value, dispersion_slope_ps_per_nm2_km=s_value)
    p = float(dbm_to_w(COMMON["power_dbm"]))
    sideband = float(small_signal_sideband_w(fibre, p, p, COMMON["wavelength_nm"],
                                             COMMON["spacing_ghz"], "high"))
    pump_out = p * math.exp(-fibre.alpha_per_km * length)
    rel = 20.0 / math.log(10.0) / gamma.value
    return _entry(10.0 * math.log10(sideband / pump_out), "dB",
                  f"Inoue small-signal, {COMMON['spacing_ghz']:g} GHz, "
                  f"{COMMON['power_dbm']:g} dBm per tone, {COMMON['wavelength_nm']:g} nm, "
                  f"D = {d_text}", runs,
                  stderr=None if gamma.stderr is None else rel * gamma.stderr,
                  u95=None if gamma.u95 is None else rel * gamma.u95,
                  u95_kind=gamma.u95_kind(), no_u_reason=gamma.extra.get("no_u_reason"))


HEADLINE_RULE = ("the newest fit whose gamma claims an expanded uncertainty and "
                 "whose D was measured (a spacing run in the fit), else the newest whose gamma "
                 "claims one (D given on the spool record), else the newest fit")


def _rank(record: Any) -> int:
    """2: gamma with a U and D measured by the fit; 1: gamma with a U; 0: anything else."""
    gamma = _param(record, GAMMA)
    if gamma is None or gamma[1].u95 is None or gamma[1].extra.get("no_u_reason"):
        return 0
    from labrun.spoolfits import GIVEN_SOURCE

    disp = _param(record, ("dispersion",))
    given = gamma[1].extra.get("dispersion_source") == GIVEN_SOURCE
    return 2 if disp is not None and not given else 1


# Why a fit is the headline, by its rank (_rank): what `labrun replay --twin` says it used.
HEADLINE_WHY = {2: "its gamma claims a U and its D was measured (a spacing run in the fit)",
                1: "its gamma claims a U, with the D given on the spool record (no spacing run "
                   "fitted)",
                0: "no fit of the spool claims a U for gamma, so the newest is used"}


def headline_why(record: Any) -> tuple[bool, str]:
    """(whether the fit's gamma claims a U, why HEADLINE_RULE picks it) for a headline fit."""
    rank = _rank(record)
    return rank > 0, HEADLINE_WHY[rank]


def _why_not_shown(record: Any) -> str:
    """'without U' or 'with a given D': why a newer fit is not the headline."""
    return "without U" if _rank(record) == 0 else "with a given D (no spacing run)"


def headline_fit(fits: list[Any]) -> tuple[Any, list[dict[str, Any]]]:
    """The fit a spool's headline comes from (HEADLINE_RULE) among its fits (oldest first), and
    the newer fits it outranks, each with why it is not shown; (None, []) without fits."""
    if not fits:
        return None, []
    best = max(fits, key=lambda f: (_rank(f), f.fit_id or 0))
    newer = [{"fit_id": f.fit_id, "why": _why_not_shown(f)} for f in fits
             if (f.fit_id or 0) > (best.fit_id or 0)]
    return best, newer


def compare_spools(store: Store, labels: list[str]) -> dict[str, Any]:
    """The spools side by side, each from its headline fit (``headline_fit``: the newest
    comparable one; newer fits not shown are named), InputError for unknown labels."""
    from sqlalchemy import select

    from labrun.spoolfits import fits_by_spool
    from labrun.store.models import Spool

    with store.session() as s:
        rows = {sp.label: sp for sp in s.scalars(select(Spool).where(Spool.label.in_(labels)))}
    unknown = [lb for lb in labels if lb not in rows]
    if unknown:
        raise InputError(f"no spool {unknown[0]!r} in this database", field="LABEL")
    fits = fits_by_spool(store)
    out = []
    for label in labels:
        fit, newer = headline_fit(fits.get(label, []))
        entry: dict[str, Any] = {"spool": label, "fit_id": fit.fit_id if fit else None,
                                 "fitted_at": _iso(fit.created_at) if fit else None,
                                 "newer_fits_not_shown": newer}
        if fit is None:
            entry["note"] = f"no stored fit: labrun fit RUN_ID ... (runs of {label})"
        else:
            entry.update(headline_values(fit, fit.spool_snapshot or rows[label]))
        out.append(entry)
    return {"spools": out, "common_conditions": COMMON, "headline_rule": HEADLINE_RULE}


def spool_history(store: Store, label: str) -> dict[str, Any]:
    """Every stored fit of one spool, oldest first: each comparable value (one that claims a U)
    checked against the previous comparable value of the same quantity, skipping fits between
    that claim no U, so a fit without U cannot hide a change; ``compared_with`` names the fit
    each value was checked against."""
    from labrun.spoolfits import fit_history

    fits = fit_history(store, label)
    history: list[dict[str, Any]] = []
    last: dict[str, tuple[int | None, dict[str, Any]]] = {}  # quantity -> (fit id, value)
    for fit in fits:
        values = headline_values(fit, fit.spool_snapshot or {})
        entry = {"fit_id": fit.fit_id, "fitted_at": _iso(fit.created_at),
                 "runs": fit.run_ids, **{k: values[k] for k in HISTORY_PARAMS if k in values}}
        flagged, against = [], {}
        for k in HISTORY_PARAMS:
            if k not in values or not comparable(values[k]):
                continue
            if k in last:
                against[k] = last[k][0]
                if changed(last[k][1], values[k]):
                    flagged.append(k)
            last[k] = (fit.fit_id, values[k])
        entry["changed"], entry["compared_with"] = flagged, against
        history.append(entry)
    return {"spool": label, "history": history,
            "changed": any(h["changed"] for h in history)}


def comparable(entry: dict[str, Any]) -> bool:
    """Whether a value claims an expanded uncertainty (a fit without U is never compared)."""
    return entry.get("comparable") is not False and entry.get("u95") is not None


def changed(a: dict[str, Any], b: dict[str, Any]) -> bool:
    """True when |b - a| exceeds the combined expanded uncertainty sqrt(Ua^2 + Ub^2); magnitudes
    are compared when either value is a magnitude (``sign_determined`` False)."""
    if a.get("u95") is None or b.get("u95") is None:
        return False
    va, vb = a["value"], b["value"]
    if a.get("sign_determined") is False or b.get("sign_determined") is False:
        va, vb = abs(va), abs(vb)
    return abs(vb - va) > math.hypot(a["u95"], b["u95"])
