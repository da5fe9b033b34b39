"""``labrun export RUN_ID --format csv|parquet|mat|hdf5 --out FILE``: a run for other tools."""

from __future__ import annotations

import argparse
from typing import Any

from labrun.store import DEFAULT_DB

FORMATS = ("csv", "parquet", "mat", "hdf5")  # labrun.export.FORMATS (not imported: fast --help)


def register(subparsers: Any) -> None:
    """Add the export command."""
    p = subparsers.add_parser(
        "export", help="write a run's points and traces as CSV, Parquet, MATLAB or HDF5",
        description="Export one stored run: points with setpoints and line powers (detected "
                    "flags, upper limits) and the spool-output traces. Column names are in "
                    "README.md ('Export').")
    p.add_argument("run_id", metavar="RUN_ID", type=int)
    p.add_argument("--format", required=True, choices=FORMATS)
    p.add_argument("--out", required=True, metavar="FILE", help="file to write")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.set_defaults(func=cmd_export)


def cmd_export(args: argparse.Namespace) -> int:
    """labrun export: write the files, print their paths."""
    from labrun.export import export_run
    from labrun.queries import require_run
    from labrun.store import open_existing_store

    store = open_existing_store(args.db)
    try:
        require_run(store, args.run_id)
        files = export_run(store, args.run_id, args.format, args.out)
    finally:
        store.close()
    for f in files:
        print(f"wrote {f}")
    return 0
