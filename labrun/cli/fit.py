"""``labrun fit RUN_ID [RUN_ID ...]``: fit a spool's stored runs together and store the fit."""

from __future__ import annotations

import argparse
import json
from typing import Any

from labrun.store import DEFAULT_DB


def register(subparsers: Any) -> None:
    """Add the fit command."""
    p = subparsers.add_parser(
        "fit", help="fit stored runs of one spool (gamma, dispersion, slopes) and store the fit",
        description="Fit the points of one or more stored runs of ONE spool together (a spacing "
                    "run supplies the dispersion to a power run of the same spool) and store "
                    "the result in the fits table. Needs the spool's length and loss on record "
                    "(from the plan's [spool] table or 'labrun spool set').")
    p.add_argument("run_ids", metavar="RUN_ID", type=int, nargs="+", help="run ids to fit")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.add_argument("--json", action="store_true",
                   help="print JSON: fit id, spool, runs, and per parameter value, stderr, u95, "
                        "unit, model")
    p.add_argument("--no-store", action="store_true", help="fit and print, store nothing")
    p.add_argument("--monte-carlo", type=_trials, default=0, metavar="M",
                   help="also propagate the budget's input distributions by Monte Carlo "
                        "(JCGM 101:2008) with M closed-form refits, and print the 95 %% "
                        "probabilistically symmetric interval beside the GUM's U (k = 2); "
                        "JCGM 101 suggests M >= 200000; a refit of a 25-point run takes a few ms")
    p.set_defaults(func=cmd_fit)


def _trials(text: str) -> int:
    """--monte-carlo M: an integer >= 2."""
    try:
        m = int(text)
    except ValueError:
        m = 0
    if m < 2:
        raise argparse.ArgumentTypeError(f"needs a whole number of trials >= 2, not {text!r}")
    return m


def format_value(value: float | None, stderr: float | None, u95: float | None,
                 unit: str, kind: str | None = None) -> str:
    """'10.89 +/- 0.0023 (U k=2 0.0047) 1/(W km)': value, standard uncertainty, and the
    expanded one labelled by what it is: 'U k=2' (GUM budget) or 'U95 t' (Student t)."""
    if value is None:
        return "-"
    text = f"{value:.5g}"
    if stderr is not None:
        text += f" +/- {stderr:.2g}"
    if u95 is not None:
        from labrun.spoolfits import u_label

        text += f" ({u_label(kind)} {u95:.2g})"
    return f"{text} {unit}"


def mc_text(p: Any) -> str | None:
    """The Monte Carlo interval of a parameter beside its GUM interval, or None."""
    ex = p.extra
    if not ex.get("mc_n") or ex.get("mc_low") is None or p.value is None:
        return None
    line = (f"    Monte Carlo (JCGM 101, M = {ex['mc_n']}, seed {ex.get('mc_seed')}): "
            f"95 % interval [{ex['mc_low']:.6g}, {ex['mc_high']:.6g}] (probabilistically "
            f"symmetric)")
    if p.u95 is not None:
        line += f"; GUM value +/- U (k = 2): [{p.value - p.u95:.6g}, {p.value + p.u95:.6g}]"
    return line


BUDGET_SHOWN = ("gamma", "dispersion", "dispersion_slope")  # the exact model's parameters
OFFSETS_NOTE = ("  (launched power a, b: the arms' offsets are fitted with the exact model "
                "(power_offset_a/_b, the bench's calibration uncertainty as their prior); that "
                "budget row replaces the per-arm calibration rows, counted once)")
OFFSETS_NOTE_TAP = ("  (launched power (tap meter): the arms' offsets are fitted with the exact "
                    "model (power_offset_a/_b): their difference from the output tone ratio, "
                    "their common part from the input-tap power meter (the bench's "
                    "tap_power_u_db), the bench's calibration uncertainty as their prior; that "
                    "budget row replaces the per-arm calibration rows, counted once)")


SLOPE_FOLLOWS_D = ("fitted jointly with D: its sign follows D's (see the notes under "
                   "dispersion)")


def shown_warnings(record: Any, name: str) -> list[str]:
    """The warnings printed under one parameter: the slope's notes that repeat those of D (the
    same joint fit: the sign of D, a bound) are said once, under dispersion; the JSON keeps
    both results' warnings whole."""
    p = record.parameters[name]
    own = [w for w in p.extra.get("warnings", []) if not w.startswith("refused")]
    d = record.parameters.get("dispersion")
    if name != "dispersion_slope" or d is None or d.value is None:
        return own
    under_d = set(d.extra.get("warnings", []))
    kept = [w for w in own if w not in under_d]
    return [SLOPE_FOLLOWS_D, *kept] if len(kept) < len(own) else kept


def fit_text(record: Any) -> str:
    """The fit as a table for people, with the GUM budget of the exact model's parameters."""
    from labrun.spoolfits import given_text, no_u_label
    from labrun.uncertainty import budget_text

    where = f"fit {record.fit_id}" if record.fit_id is not None else "fit (not stored)"
    runs = ", ".join(str(r) for r in record.run_ids)
    out = [f"{where}: spool {record.spool}, runs {runs}"]
    for name, p in record.parameters.items():
        if p.value is None:
            why = next((w for w in p.extra.get("warnings", []) if w.startswith("refused")), None)
            if why:
                out.append(f"  {name:<20} {why}")
            continue
        no_u = no_u_label(p.extra)
        shown = (f"{p.value:.5g} {p.unit} ({no_u})" if no_u else
                 format_value(p.value, p.stderr, p.u95, p.unit, p.u95_kind()))
        out.append(f"  {name:<20} {shown:<48} "
                   f"{p.n_points:>4} points  {p.model.split(':')[0]}")
        if no_u and name == "gamma":
            out.append(f"    ! {p.extra['no_u_reason']}; {p.extra.get('no_u_hint', '')}")
        given = given_text(p.extra)
        if given and name == "gamma":
            out.append(f"    {given}")
        if p.extra.get("budget") and name in BUDGET_SHOWN:
            out.append(budget_text(name, p.to_dict()))
        mc = mc_text(p)
        if mc:
            out.append(mc)
        out.extend(f"    ! {w}" for w in shown_warnings(record, name))
    from labrun.spoolfits import NO_U_LEGEND, U_LEGEND

    out.append(f"  (+/- statistical standard uncertainty of the fit; {U_LEGEND})")
    if any(no_u_label(p.extra) for p in record.parameters.values()):
        out.append(f"  (no U: {NO_U_LEGEND})")
    if "power_offset_a" in record.parameters:
        tap = record.parameters["power_offset_a"].extra.get("tap_used")
        out.append(OFFSETS_NOTE_TAP if tap else OFFSETS_NOTE)
    return "\n".join(out)


def cmd_fit(args: argparse.Namespace) -> int:
    """labrun fit: fit the runs, store the fit (unless --no-store), print it."""
    from labrun.spoolfits import fit_runs
    from labrun.store import open_existing_store

    store = open_existing_store(args.db, upgrade=not args.no_store)
    try:
        record = fit_runs(store, args.run_ids, save=not args.no_store,
                          monte_carlo=args.monte_carlo)
    finally:
        store.close()
    print(json.dumps(record.to_dict(), indent=2) if args.json else fit_text(record))
    return 0
