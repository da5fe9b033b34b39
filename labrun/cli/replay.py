"""``labrun replay``: a stored run played again with no lab, from its recorded traffic."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from labrun.store import DEFAULT_DB


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``labrun replay``."""
    p = subparsers.add_parser(
        "replay", help="replay a stored run without instruments (virtual: no light is emitted)",
        description="Replay a stored run as a new run linked to it. With --traffic-log FILE the "
                    "run's recorded instrument traffic is played back through a simulated VISA "
                    "backend: reduction, checks and storage happen again, the lines must equal "
                    "the original's bit for bit, and any command that differs from the "
                    "recording stops the replay.")
    p.add_argument("run_id", metavar="RUN_ID", type=int, help="run id (see 'labrun status')")
    p.add_argument("--traffic-log", required=True, metavar="FILE",
                   help="the run's traffic log (written by 'labrun run --traffic-log FILE')")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.add_argument("--json", action="store_true", help="print the outcome as JSON on stdout")
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    p.set_defaults(func=cmd_replay)


def cmd_replay(args: argparse.Namespace) -> int:
    """Replay, print the outcome; exit 0 when the replay reproduced the run, 1 otherwise."""
    from pathlib import Path

    from labrun.errors import InputError
    from labrun.replay import replay_traffic
    from labrun.store import open_existing_store

    if not Path(args.traffic_log).is_file():
        raise InputError("no such traffic log", file=args.traffic_log, field="--traffic-log")
    store = open_existing_store(args.db)
    try:
        result = replay_traffic(store, args.run_id, args.traffic_log,
                                progress=not (args.no_progress or args.json))
    finally:
        store.close()
    _show(result.to_dict(), args.json)
    return 0 if result.identical else 1


def _show(out: dict[str, Any], as_json: bool) -> None:
    """The outcome as JSON, or a few lines for a person."""
    if as_json:
        print(json.dumps(out, indent=2))
        return
    print(f"run {out['run_id']} (virtual replay of run {out['replay_of']} from its traffic "
          f"log): {out['status']}, {out['points_done']}/{out['points_total']} points")
    if out["identical"]:
        print("  lines identical to the original's, bit for bit")
    else:
        print("  lines DIFFER from the original's:", file=sys.stdout)
        for line in out["differences"]:
            print(f"    {line}")
    if out["unused_exchanges"]:
        print(f"  {out['unused_exchanges']} recorded exchanges were not asked for")
