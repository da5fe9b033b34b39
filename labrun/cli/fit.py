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
    p.set_defaults(func=cmd_fit)


def format_value(value: float | None, stderr: float | None, u95: float | None,
                 unit: str) -> str:
    """'10.89 +/- 0.0023 (U95 0.0047) 1/(W km)': value, standard and expanded uncertainty."""
    if value is None:
        return "-"
    text = f"{value:.5g}"
    if stderr is not None:
        text += f" +/- {stderr:.2g}"
    if u95 is not None:
        text += f" (U95 {u95:.2g})"
    return f"{text} {unit}"


BUDGET_SHOWN = ("gamma", "dispersion", "dispersion_slope")  # the exact model's parameters
OFFSETS_NOTE = ("  (launched power a, b: the arms' offsets are fitted with the exact model "
                "(power_offset_a/_b, the bench's calibration uncertainty as their prior); that "
                "budget row replaces the per-arm calibration rows, counted once)")


def fit_text(record: Any) -> str:
    """The fit as a table for people, with the GUM budget of the exact model's parameters."""
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
        out.append(f"  {name:<20} {format_value(p.value, p.stderr, p.u95, p.unit):<48} "
                   f"{p.n_points:>4} points  {p.model.split(':')[0]}")
        if p.extra.get("budget") and name in BUDGET_SHOWN:
            out.append(budget_text(name, p.to_dict()))
        out.extend(f"    ! {w}" for w in p.extra.get("warnings", []) if not w.startswith("refused"))
    out.append("  (+/- statistical standard uncertainty of the fit; U95 expanded uncertainty: "
               "the GUM budget, k = 2, where a budget is shown, else Student t on the fit)")
    if "power_offset_a" in record.parameters:
        out.append(OFFSETS_NOTE)
    return "\n".join(out)


def cmd_fit(args: argparse.Namespace) -> int:
    """labrun fit: fit the runs, store the fit (unless --no-store), print it."""
    from labrun.spoolfits import fit_runs
    from labrun.store import open_existing_store

    store = open_existing_store(args.db, upgrade=not args.no_store)
    try:
        record = fit_runs(store, args.run_ids, save=not args.no_store)
    finally:
        store.close()
    print(json.dumps(record.to_dict(), indent=2) if args.json else fit_text(record))
    return 0
