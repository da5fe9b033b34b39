"""``labrun compare LABEL [LABEL ...]``: spools side by side, or one spool's history."""

from __future__ import annotations

import argparse
import json
from typing import Any

from labrun.store import DEFAULT_DB

ROWS = (("gamma_per_w_per_km", "gamma"), ("dispersion_ps_per_nm_km", "D"),
        ("dispersion_slope_ps_per_nm2_km", "dispersion slope"), ("loss_db_per_km", "loss"),
        ("effective_length_km", "effective length"),
        ("first_sideband_efficiency_db", "1st sideband/pump"))


def register(subparsers: Any) -> None:
    """Add the compare command."""
    p = subparsers.add_parser(
        "compare", help="spools side by side (or one spool's history) from stored fits",
        description="Compare spools by their headline fits (as labrun spools picks them: the "
                    "newest fit whose gamma claims a U, one with a measured D first): gamma, D, "
                    "dispersion slope, loss, effective length and the first-sideband efficiency "
                    "at common conditions, each with its uncertainty and runs. With one label: "
                    "that spool's fits over time, flagging a value that differs from the previous"
                    " fit claiming a U for it (fits without U skipped) by more than the two "
                    "expanded uncertainties combined. D and its slope are signed where the fit "
                    "determined the sign of D, else shown as |D| and d|D|/dlambda, as labrun fit "
                    "shows them.")
    p.add_argument("labels", metavar="LABEL", nargs="+", help="spool labels")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.add_argument("--json", action="store_true", help="print JSON on stdout")
    p.add_argument("--plot", metavar="FILE.png", help="also draw the comparison (or history)")
    p.set_defaults(func=cmd_compare)


# What a value is when the fit did not determine the sign of D (labrun.fits' conventions).
KEY_D = "dispersion_ps_per_nm_km"
UNSIGNED = {KEY_D: "|D| ", "dispersion_slope_ps_per_nm2_km": "d|D|/dlambda "}
SIGN_NOTE = "|D|, d|D|/dlambda: the fit did not determine the sign of D"
CHANGED_LEGEND = ("CHANGED: differs from the previous fit that claims a U for it (fits without "
                  "U skipped) by more than the two fits' expanded uncertainties combined, "
                  "sqrt(U1^2 + U2^2)")


def _value(entry: dict[str, Any] | None, key: str = "") -> str:
    """'10.89 (U k=2 0.0047) 1/(W km)': the expanded uncertainty labelled by what it is, as
    ``labrun fit`` labels it ('U k=2' the GUM budget's 2 u_c, 'U95 t' a Student-t half-width);
    D and its slope prefixed '|D| ' / 'd|D|/dlambda ' when the fit did not determine D's sign."""
    from labrun.spoolfits import u_label

    if not entry or entry.get("value") is None:
        return "-"
    text = UNSIGNED.get(key, "") if entry.get("sign_determined") is False else ""
    text += f"{entry['value']:.4g}"
    if entry.get("comparable") is False:
        return f"{text} {entry['unit']} [no U]"
    if entry.get("u95") is not None:
        text += f" ({u_label(entry.get('u95_kind'))} {entry['u95']:.2g})"
    return f"{text} {entry['unit']}"


def _d_text(entry: dict[str, Any] | None) -> str:
    """'D -4.604 (...)' or '|D| 4.604 (...)': D named as what it is."""
    text = _value(entry, KEY_D)
    return text if text.startswith(UNSIGNED[KEY_D]) else f"D {text}"


def _no_u_note() -> str:
    """The legend line of a value marked [no U]."""
    from labrun.spoolfits import NO_U_HINT, NO_U_LEGEND

    return f"([no U]: {NO_U_LEGEND}; {NO_U_HINT})"


def _source(sp: dict[str, Any]) -> str:
    """'12 (3, 4)': the fit a spool's values come from and its runs, or why there is none."""
    gamma = sp.get("gamma_per_w_per_km")
    if sp.get("fit_id") is None or gamma is None:
        return sp.get("note") or "-"
    return f"{sp['fit_id']} ({', '.join(map(str, gamma['runs']))})"


def _side_by_side(rep: dict[str, Any]) -> str:
    from labrun.spoolfits import U_LEGEND

    spools = rep["spools"]
    width = 46
    out = [f"{'':<18}" + "".join(f"{sp['spool']:<{width}}" for sp in spools)]
    for key, name in ROWS:
        out.append(f"{name:<18}" + "".join(f"{_value(sp.get(key), key):<{width}}"
                                           for sp in spools))
    out.append(f"{'fit (runs)':<18}" + "".join(f"{_source(sp):<{width}}" for sp in spools))
    c = rep["common_conditions"]
    out.append(f"({U_LEGEND}; {SIGN_NOTE}; efficiency at {c['spacing_ghz']:g} GHz, "
               f"{c['power_dbm']:g} dBm per tone, {c['wavelength_nm']:g} nm)")
    if any(v.get("comparable") is False for sp in spools for v in sp.values()
           if isinstance(v, dict)):
        out.append(_no_u_note())
    for sp in spools:
        newer = sp.get("newer_fits_not_shown") or []
        if newer:
            said = ", ".join(f"fit {n['fit_id']} {n['why']}" for n in newer)
            out.append(f"{sp['spool']}: newer {said} not shown; labrun compare {sp['spool']}")
    if any(sp.get("newer_fits_not_shown") for sp in spools):
        out.append(f"(fit: the headline fit, {rep['headline_rule']})")
    return "\n".join(out)


def _history(rep: dict[str, Any]) -> str:
    from labrun.spoolfits import U_LEGEND

    out = [f"spool {rep['spool']}: {len(rep['history'])} stored fits"]
    for h in rep["history"]:
        against = h.get("compared_with", {})
        flag = ("  CHANGED: " + ", ".join(f"{k} (vs fit {against.get(k)})"
                                          for k in h["changed"])) if h["changed"] else ""
        runs = ",".join(map(str, h["runs"]))
        out.append(f"  fit {h['fit_id']:>4}  {h['fitted_at'][:19]}  runs {runs:<10} "
                   f"gamma {_value(h.get('gamma_per_w_per_km'))}"
                   f"  {_d_text(h.get(KEY_D))}{flag}")
    out.append(f"({U_LEGEND}; {SIGN_NOTE}; {CHANGED_LEGEND})")
    if any(v.get("comparable") is False for h in rep["history"] for v in h.values()
           if isinstance(v, dict)):
        out.append(_no_u_note())
    return "\n".join(out)


def cmd_compare(args: argparse.Namespace) -> int:
    """labrun compare: side by side for several labels, history for one."""
    from labrun.compare import compare_spools, spool_history
    from labrun.store import open_existing_store

    store = open_existing_store(args.db)
    try:
        labels = list(dict.fromkeys(args.labels))
        rep = spool_history(store, labels[0]) if len(labels) == 1 else \
            compare_spools(store, labels)
    finally:
        store.close()
    if args.plot:
        from labrun.plots import plot_comparison, plot_history

        (plot_history if len(labels) == 1 else plot_comparison)(args.plot, rep)
    if args.json:
        print(json.dumps(rep, indent=2))
    else:
        print(_history(rep) if len(labels) == 1 else _side_by_side(rep))
        if args.plot:
            print(f"wrote {args.plot}")
    return 0
