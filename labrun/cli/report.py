"""``labrun report RUN_ID | --spool LABEL --out report.html``: one self-contained HTML page."""

from __future__ import annotations

import argparse
from typing import Any

from labrun.errors import InputError
from labrun.store import DEFAULT_DB


def register(subparsers: Any) -> None:
    """Add the report command."""
    p = subparsers.add_parser(
        "report", help="write one self-contained HTML page about a run or a spool",
        description="A run's page: summary, spectra, sideband power against launched power with "
                    "the fitted slopes, efficiency against spacing, polarisation dependence, "
                    "events and faults, fits with uncertainties. A spool's page: its runs and "
                    "fits over time. Plots are embedded; the file stands alone.")
    p.add_argument("run_id", metavar="RUN_ID", type=int, nargs="?", help="run id")
    p.add_argument("--spool", metavar="LABEL", help="a spool's page instead of a run's")
    p.add_argument("--out", default="report.html", metavar="FILE",
                   help="HTML file to write (default: report.html)")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.set_defaults(func=cmd_report)


def cmd_report(args: argparse.Namespace) -> int:
    """labrun report: write the page, print its path."""
    from labrun.report import write_report
    from labrun.store import open_existing_store

    if (args.run_id is None) == (args.spool is None):
        raise InputError("give a RUN_ID or --spool LABEL (one of them)", field="RUN_ID")
    store = open_existing_store(args.db)
    try:
        path = write_report(store, args.out, run_id=args.run_id, spool=args.spool)
    finally:
        store.close()
    print(f"wrote {path}")
    return 0
