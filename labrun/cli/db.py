"""``labrun db upgrade``: bring a run store's schema up to this labrun (Alembic revisions)."""

from __future__ import annotations

import argparse
import json
from typing import Any

from labrun.store import DEFAULT_DB


def register(subparsers: Any) -> None:
    """Add the db command group."""
    p = subparsers.add_parser("db", help="run-store maintenance (schema upgrade)",
                              description="Maintenance of a run store.")
    sub = p.add_subparsers(dest="db_command", metavar="ACTION", required=True,
                           parser_class=type(p))
    up = sub.add_parser("upgrade", help="upgrade the database schema to this labrun's",
                        description="Apply every schema revision this labrun has and the "
                                    "database lacks (a database made by an older labrun). "
                                    "Rows are kept. Back up a shared database first.")
    up.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                    help=f"run store: SQLite file or SQLAlchemy URL (default: {DEFAULT_DB})")
    up.add_argument("--json", action="store_true", help="print the revisions as JSON")
    up.set_defaults(func=cmd_upgrade)


def cmd_upgrade(args: argparse.Namespace) -> int:
    """Upgrade the store at --db; prints the revision before and after."""
    from labrun.store import open_existing_store, schema

    store = open_existing_store(args.db, upgrade=True)
    try:
        with store.engine.connect() as conn:
            after = schema.revision_of(conn)
    finally:
        store.close()
    before = store.upgraded_from or after
    if args.json:
        print(json.dumps({"db": store.url, "before": before, "after": after}))
    elif before == after:
        print(f"{store.url}: schema already at revision {after}")
    else:
        print(f"{store.url}: schema upgraded from revision {before} to {after}")
    return 0
