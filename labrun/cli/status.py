"""``labrun status [RUN_ID]``: progress, ETA, last point, faults and heartbeat age of a run.

Reads the store only (WAL lets it read while the run process writes), so it works from any
terminal, also when the run process is stuck or dead: a stale heartbeat is called out. A SQLite
store is read with the standard library alone (``labrun.store.statusview``), so status starts
without SQLAlchemy.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from labrun.errors import InputError
from labrun.store import DEFAULT_DB

STALE_AFTER_S = 60.0  # heartbeat older than this (and 5 points' time) on a running run: stale
STALE_POINTS = 5.0


def register(subparsers: Any) -> None:
    """Add the status command."""
    p = subparsers.add_parser(
        "status", help="progress of a run (the latest by default)",
        description="Show a run's progress, ETA, last point, faults and heartbeat age. Safe to "
                    "use while the run is writing.")
    p.add_argument("run_id", metavar="RUN_ID", type=int, nargs="?",
                   help="run id (default: the latest run)")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.add_argument("--json", action="store_true", help="print JSON on stdout")
    p.set_defaults(func=cmd_status)


def _num(v: Any) -> float | None:
    """A finite float or None."""
    return float(v) if isinstance(v, int | float) and math.isfinite(v) else None


def status_report(summary: dict[str, Any], *, now: Any = None) -> dict[str, Any]:
    """The JSON of ``labrun status`` from a Store.summary()."""
    from labrun.store.kinds import utcnow

    now = now or utcnow()
    run = summary["run"]
    done, total = summary["points_done"], int(run.points_total or 0)
    pace = summary["seconds_per_point"]  # measured, once two points are stored
    pace_source = "measured" if pace is not None else None
    if pace is None and isinstance(run.settings, dict) and run.settings.get(
            "estimate_s_per_point") is not None:  # until then: the rehearsal's (labrun check)
        pace, pace_source = float(run.settings["estimate_s_per_point"]), "estimate"
    running = run.status == "running"
    age = (now - run.heartbeat_at).total_seconds() if run.heartbeat_at else None
    stale_limit = max(STALE_AFTER_S, STALE_POINTS * (pace or 0.0))
    died = _died(running, summary.get("guardian"), run.heartbeat_at)
    stale = bool(running and died is None and (age is None or age > stale_limit))
    eta = (pace * (total - done) if running and pace is not None and not stale and died is None
           else None)
    last = summary["last_point"]
    last_fault = summary["last_fault"]
    return {
        "run_id": run.id, "status": run.status, "reason": run.reason,
        "points_done": done, "points_total": total,
        "percent": round(100.0 * done / total, 1) if total else None,
        "seconds_per_point": pace, "pace_source": pace_source, "eta_s": eta,
        "plan": run.plan_name, "operator": run.operator, "bench": run.bench_name,
        "replay_of": run.replay_of,
        "started_at": run.started_at.isoformat() if run.started_at else None,
        "finished_at": run.finished_at.isoformat() if run.finished_at else None,
        "heartbeat_age_s": age, "stale": stale, "process_died": died,
        "faults": summary["faults"],
        "last_fault": None if last_fault is None else {
            "at": last_fault.at.isoformat(), "role": last_fault.role,
            "message": last_fault.message},
        "last_point": None if last is None else {
            "key": last.key, "index": last.index, "setpoint": last.setpoint,
            "finished_at": last.finished_at.isoformat(),
            "lines": [{"kind": ln.kind, "side": ln.side, "order": ln.order,
                       "power_dbm": _num(ln.power_dbm), "detected": ln.detected,
                       "upper_limit_dbm": _num(ln.upper_limit_dbm)}
                      for ln in summary["last_lines"]],
        },
    }


def _died(running: bool, guardian: Any, heartbeat_at: Any) -> dict[str, Any] | None:
    """The guardian watcher's event when it says the run process died with this run still
    ``running`` in the store and no heartbeat since (a resumed run beats again), else None."""
    if not running or guardian is None:
        return None
    if heartbeat_at is not None and guardian.at is not None and heartbeat_at > guardian.at:
        return None  # resumed since: a live process is behind the run again
    return {"at": guardian.at.isoformat() if guardian.at else None, "message": guardian.message}


def with_fallback(rep: dict[str, Any], url: str) -> dict[str, Any]:
    """The report with the final status the database refused (labrun/runstore.py: the record
    kept beside it) in place of a ``running`` that no process is behind any more."""
    from labrun.runstore import fallback_path, read_fallback
    from labrun.store.kinds import FINISHED_STATUSES

    record = read_fallback(url).get(int(rep["run_id"]))
    if record is None or rep["status"] in FINISHED_STATUSES:
        return rep
    where = fallback_path(url)
    return {**rep, "status": record["status"], "stale": False, "eta_s": None,
            "reason": f"{record.get('reason') or record['status']} (kept in {where}: the "
                      "database refused it; 'labrun resume' writes it in)",
            "fallback": str(where)}


def _fmt_s(seconds: float | None) -> str:
    """'1 h 02 min', '3 min 05 s', '12 s'."""
    if seconds is None:
        return "unknown"
    s = int(round(seconds))
    if s >= 3600:
        return f"{s // 3600} h {s % 3600 // 60:02d} min"
    if s >= 60:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s} s"


def _label(ln: dict[str, Any]) -> str:
    """'tone a', 'tone b', 'low 1', 'high 1' (labrun.lines convention)."""
    from labrun.lines import LineId

    return LineId(ln["kind"], ln["side"], ln["order"]).label()


def _power(ln: dict[str, Any]) -> str:
    """'-3.1' or '<-61.0' (an upper limit) or '?'."""
    if ln["power_dbm"] is not None:
        return f"{ln['power_dbm']:.1f}"
    if ln["upper_limit_dbm"] is not None:
        return f"<{ln['upper_limit_dbm']:.1f}"
    return "?"


def _text(rep: dict[str, Any]) -> str:
    """Human-readable status."""
    out = [f"run {rep['run_id']} ({rep['plan']}, operator {rep['operator'] or '-'}): "
           f"{rep['status']}" + (f" ({rep['reason']})" if rep["reason"] else "")]
    if rep.get("replay_of") is not None:
        out.append(f"  VIRTUAL replay of run {rep['replay_of']} (no light was emitted)")
    out.append(f"  points   {rep['points_done']}/{rep['points_total']}"
               + (f" ({rep['percent']}%)" if rep["percent"] is not None else ""))
    died = rep.get("process_died")
    if died:
        out.append(f"  WARNING: the run process died; {died['message']}. Run 'labrun resume "
                   f"{rep['run_id']}' to continue it ('labrun show {rep['run_id']}' lists its "
                   "events).")
    if rep["status"] == "running" and not died:
        out.append(f"  ETA      {_fmt_s(rep['eta_s'])}"
                   + (f" at {rep['seconds_per_point']:.2f} s/point"
                      + (" (estimated)" if rep.get("pace_source") == "estimate" else "")
                      if rep["seconds_per_point"] else ""))
    out.append(f"  heartbeat {_fmt_s(rep['heartbeat_age_s'])} ago")
    if rep["stale"]:
        out.append("  WARNING: heartbeat is stale: the run process may be stuck or dead. "
                   "Run 'labrun off --bench BENCH' to be sure the sources are off, then "
                   f"'labrun resume {rep['run_id']}'.")
    lp = rep["last_point"]
    if lp:
        powers = ", ".join(f"{_label(ln)} {_power(ln)}" for ln in lp["lines"]
                           if ln["order"] <= 1)
        out.append(f"  last     #{lp['index']} {lp['key']}")
        if powers:
            out.append(f"           {powers} dBm")
    out.append(f"  faults   {rep['faults']}" + (
        f" (last: {rep['last_fault']['message']})" if rep["last_fault"] else ""))
    return "\n".join(out)


def cmd_status(args: argparse.Namespace) -> int:
    """labrun status [RUN_ID]: print a run's progress."""
    from labrun.store.statusview import read_status

    # never creates a database just to find it empty; SQLite is read without SQLAlchemy
    url, summary, run_id = read_status(args.db, args.run_id)
    if summary is None:
        raise InputError(f"no run {run_id}", file=str(args.db), field="RUN_ID")
    rep = with_fallback(status_report(summary), url)
    if args.json:
        print(json.dumps(rep, indent=2))
    else:
        print(_text(rep))
    if rep["stale"]:
        print(f"labrun: warning: run {rep['run_id']} heartbeat is stale "
              f"({_fmt_s(rep['heartbeat_age_s'])})", file=sys.stderr)
    return 0
