"""``labrun runs`` (list stored runs) and ``labrun show RUN_ID`` (one run in full)."""

from __future__ import annotations

import argparse
import json
from datetime import UTC, datetime
from typing import Any

from labrun.errors import InputError
from labrun.store import DEFAULT_DB

STATUSES = ("created", "running", "completed", "stopped", "interrupted", "aborted", "failed")


def _db_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.add_argument("--json", action="store_true", help="print JSON on stdout")


def register(subparsers: Any) -> None:
    """Add the runs and show commands."""
    p = subparsers.add_parser("runs", help="list stored runs (newest first)",
                              description="List the runs in a store, newest first.")
    p.add_argument("--spool", metavar="LABEL", help="only runs of this spool")
    p.add_argument("--since", metavar="DATE",
                   help="only runs created at or after DATE (YYYY-MM-DD or ISO 8601 time; UTC)")
    p.add_argument("--status", choices=STATUSES, help="only runs with this status")
    _db_arg(p)
    p.set_defaults(func=cmd_runs)

    sh = subparsers.add_parser("show", help="one stored run: plan, bench, spool, events, fits",
                               description="Everything stored about one run, except its data "
                                           "(see 'labrun export' for the points and traces).")
    sh.add_argument("run_id", metavar="RUN_ID", type=int)
    _db_arg(sh)
    sh.set_defaults(func=cmd_show)


def parse_since(text: str) -> datetime:
    """A UTC datetime from YYYY-MM-DD or an ISO 8601 time (naive means UTC)."""
    try:
        when = datetime.fromisoformat(text)
    except ValueError:
        raise InputError(f"not a date ({text!r}; use YYYY-MM-DD or an ISO 8601 time)",
                         field="--since") from None
    return when.replace(tzinfo=UTC) if when.tzinfo is None else when.astimezone(UTC)


def _iso(v: Any) -> str | None:
    return None if v is None else v.isoformat()


def runs_rows(store: Any, *, spool: str | None, since: datetime | None,
              status: str | None) -> list[dict[str, Any]]:
    """The runs table as JSON-ready dicts."""
    from labrun.queries import runs_table

    rows = runs_table(store, spool=spool, since=since, status=status)
    for r in rows:
        for k in ("created_at", "started_at", "finished_at"):
            r[k] = _iso(r[k])
        r["run_id"], r["points_done"] = int(r["run_id"]), int(r["points_done"])
    return rows


def cmd_runs(args: argparse.Namespace) -> int:
    """labrun runs: the runs table."""
    from labrun.store import open_existing_store

    since = parse_since(args.since) if args.since else None
    store = open_existing_store(args.db)
    try:
        rows = runs_rows(store, spool=args.spool, since=since, status=args.status)
    finally:
        store.close()
    if args.json:
        print(json.dumps({"runs": rows}, indent=2))
        return 0
    if not rows:
        print("no runs match")
        return 0
    print(f"{'run':>5}  {'spool':<12} {'status':<11} {'points':>11}  {'created (UTC)':<16}  plan")
    for r in rows:
        created = (r["created_at"] or "")[:16].replace("T", " ")
        print(f"{r['run_id']:>5}  {r['spool'] or '-':<12} {r['status']:<11} "
              f"{r['points_done']:>5}/{r['points_total']:<5}  {created:<16}  {r['plan_name']}")
    return 0


def show_report(store: Any, run_id: int) -> dict[str, Any]:
    """One run as JSON-ready dict: its row, spool, counts, events and the fits that used it."""
    from sqlalchemy import func, select

    from labrun.spoolfits import fits_using_run
    from labrun.store.models import Event, Point, Run

    with store.session() as s:
        run = s.get(Run, run_id)
        if run is None:
            raise InputError(f"no run {run_id} in this database", field="RUN_ID")
        done = int(s.scalar(select(func.count(Point.id)).where(Point.run_id == run_id)) or 0)
        events = s.scalars(select(Event).where(Event.run_id == run_id).order_by(Event.id)).all()
        spool = run.spool
        rep = {
            "run_id": run.id, "status": run.status, "reason": run.reason,
            "plan_name": run.plan_name, "plan_path": run.plan_path,
            "plan_sha256": run.plan_sha256, "bench_name": run.bench_name,
            "bench_path": run.bench_path, "operator": run.operator,
            "unattended": run.unattended, "software_version": run.software_version,
            "host": run.host, "points_done": done, "points_total": run.points_total,
            "created_at": _iso(run.created_at), "started_at": _iso(run.started_at),
            "finished_at": _iso(run.finished_at), "identities": run.identities,
            "spool": None if spool is None else {
                "label": spool.label, "length_km": spool.length_km,
                "loss_db_per_km": spool.loss_db_per_km, "fibre_type": spool.fibre_type},
            "events": [{"at": _iso(e.at), "kind": e.kind, "role": e.role,
                        "point_key": e.point_key, "message": e.message} for e in events],
        }
    rep["fits"] = [f.to_dict() for f in fits_using_run(store, run_id)]
    return rep


def cmd_show(args: argparse.Namespace) -> int:
    """labrun show RUN_ID."""
    from labrun.store import open_existing_store

    store = open_existing_store(args.db)
    try:
        rep = show_report(store, args.run_id)
    finally:
        store.close()
    if args.json:
        print(json.dumps(rep, indent=2))
        return 0
    sp = rep["spool"]
    print(f"run {rep['run_id']}: {rep['status']}" + (f" ({rep['reason']})"
                                                    if rep["reason"] else ""))
    print(f"  plan     {rep['plan_name']}  ({rep['plan_path']}, sha256 {rep['plan_sha256'][:12]})")
    print(f"  bench    {rep['bench_name']}  ({rep['bench_path']})")
    print("  spool    " + ("-" if sp is None else
                            f"{sp['label']} ({sp['length_km']} km, {sp['loss_db_per_km']} dB/km, "
                            f"{sp['fibre_type'] or 'type not recorded'})"))
    print(f"  points   {rep['points_done']}/{rep['points_total']}")
    print(f"  operator {rep['operator']}{' (unattended)' if rep['unattended'] else ''}; "
          f"labrun {rep['software_version']} on {rep['host']}")
    print(f"  times    created {rep['created_at']}, started {rep['started_at']}, "
          f"finished {rep['finished_at']}")
    print(f"  events   {len(rep['events'])}")
    for e in rep["events"][-10:]:
        print(f"    {e['at'][:19]} {e['kind']:<12} {e['message'][:80]}")
    for f in rep["fits"]:
        print(f"  fit {f['fit_id']} ({f['created_at'][:19]}, runs "
              f"{', '.join(map(str, f['runs']))}): " + ", ".join(
                  f"{k} {v['value']:.4g}" for k, v in f["parameters"].items()
                  if v["value"] is not None and not k.startswith("slope")))
    return 0
