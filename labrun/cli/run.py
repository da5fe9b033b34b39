"""``labrun run`` and ``labrun resume``: execute a sweep plan on a bench into the run store."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from labrun.cli import add_traffic_log_option
from labrun.store import DEFAULT_DB

DB_HELP = (f"SQLAlchemy URL or SQLite file path of the run store (default: {DEFAULT_DB} in the "
           "current folder)")
CONFIRM_WORD = "emit"


def register(subparsers: Any) -> None:
    """Add the run and resume commands."""
    p = subparsers.add_parser(
        "run", help="run a sweep plan on a bench, storing every point",
        description="Run a sweep plan on a bench. Every point (trace and lines) is stored as it "
                    "is measured; every way out switches the sources off.")
    p.add_argument("plan", metavar="PLAN",
                   help="sweep plan (TOML), or the name of a shipped example in sweeps/")
    p.add_argument("--bench", required=True, metavar="BENCH", help="bench file (TOML)")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH", help=DB_HELP)
    p.add_argument("--unattended", action="store_true",
                   help="no one at the bench: needs --operator and --ack-safety")
    p.add_argument("--operator", metavar="NAME", help="who is responsible for this run")
    p.add_argument("--ack-safety", action="store_true",
                   help="acknowledge the worst case and cautions (recorded with name and time)")
    p.add_argument("--json", action="store_true", help="print the outcome as JSON on stdout")
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    add_traffic_log_option(p, "stream every instrument exchange to FILE as JSON lines "
                              "(flushed after each point)")
    p.set_defaults(func=cmd_run, command_name="run", confirm=ask_operator,
                   open_store=None)

    r = subparsers.add_parser(
        "resume", help="continue an interrupted run, skipping the points already stored",
        description="Continue a run that was interrupted, aborted or killed. Refuses when the "
                    "plan file or the instruments changed, unless --force.")
    r.add_argument("run_id", metavar="RUN_ID", type=int, help="run id (see 'labrun status')")
    r.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH", help=DB_HELP)
    r.add_argument("--bench", metavar="BENCH", help="bench file (default: the run's own)")
    r.add_argument("--force", action="store_true",
                   help="resume despite a changed plan file or different instruments (never "
                        "while the run's own process is still alive)")
    r.add_argument("--unattended", action="store_true",
                   help="no one at the bench: needs --operator and --ack-safety")
    r.add_argument("--operator", metavar="NAME", help="who is responsible for the resumed run")
    r.add_argument("--ack-safety", action="store_true",
                   help="acknowledge the worst case and cautions again (recorded with name and "
                        "time): resuming switches the sources on again")
    r.add_argument("--json", action="store_true", help="print the outcome as JSON on stdout")
    r.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    add_traffic_log_option(r, "stream every instrument exchange to FILE as JSON lines, "
                              "appended to what it holds (flushed after each point)")
    r.set_defaults(func=cmd_resume, command_name="resume", confirm=ask_operator)


def ask_operator(text: str) -> bool:
    """Show the worst case and cautions; True only if the operator types the confirmation word."""
    print(text, file=sys.stderr)
    if not sys.stdin.isatty():
        print("labrun: no terminal to confirm on; use --unattended --operator NAME --ack-safety",
              file=sys.stderr)
        return False
    try:
        answer = input(f"Type '{CONFIRM_WORD}' to switch the sources on: ")
    except EOFError:
        return False
    return answer.strip().lower() == CONFIRM_WORD


def _report(outcome: Any, as_json: bool) -> int:
    """Print the outcome (JSON on stdout, or one line on stderr) and return the exit code."""
    if as_json:
        print(json.dumps(outcome.to_dict(), indent=2))
    else:
        line = f"run {outcome.run_id}: {outcome.status}, {outcome.points_done}/" \
               f"{outcome.points_total} points"
        if outcome.reason:
            line += f" ({outcome.reason})"
        print(line, file=sys.stderr)
    if outcome.safe_off_problems:
        print("labrun: WARNING: could not confirm every source off: "
              + "; ".join(outcome.safe_off_problems) + " -- run 'labrun off' and check the bench",
              file=sys.stderr)
    return outcome.exit_code


def check_unattended(args: argparse.Namespace) -> None:
    """Unattended needs --operator and --ack-safety: InputError (exit 2) before anything opens."""
    if args.unattended and not (args.operator and args.ack_safety):
        from labrun.errors import InputError

        flag = "--operator NAME" if not args.operator else "--ack-safety"
        raise InputError(f"an unattended {args.command_name} needs {flag}",
                         field=flag.split()[0])


def cmd_run(args: argparse.Namespace) -> int:
    """labrun run PLAN --bench BENCH ...: validate everything, then run."""
    from labrun.bench import load_bench
    from labrun.engine import require_roles, run_plan
    from labrun.plan import load_plan
    from labrun.rehearse import estimate_per_point
    from labrun.store.deferred import open_deferred

    # a path, or the name of a shipped example ("power-sweep")
    plan = load_plan(args.plan)
    bench = load_bench(args.bench)
    check_unattended(args)
    require_roles(plan, bench)  # a bench that cannot run the plan: refused before any store
    traffic_log = open_traffic_log(args, append=False)
    try:
        # SQLite is checked now and opened on a thread while the bench opens (SQLAlchemy's
        # import is not on the way to the first instrument exchange)
        estimate = estimate_per_point(plan, bench)  # rehearsed before the store is opened
        store = open_deferred(args.db, opener=args.open_store)
        try:
            outcome = run_plan(plan, bench, store, operator=args.operator,
                               unattended=args.unattended, ack_safety=args.ack_safety,
                               confirm=args.confirm, progress=not args.no_progress,
                               traffic_log=traffic_log, echo=sys.stderr,
                               estimate_s_per_point=estimate, guardian=True)
        finally:
            store.close()
    finally:
        if traffic_log is not None:
            traffic_log.close()
    return _report(outcome, args.json)


def cmd_resume(args: argparse.Namespace) -> int:
    """labrun resume RUN_ID: continue a stored run where it stopped."""
    from labrun.bench import load_bench
    from labrun.engine import resume_run
    from labrun.store import open_existing_store

    check_unattended(args)
    bench = load_bench(args.bench) if args.bench else None
    store = open_existing_store(args.db, upgrade=True)  # a run to resume must be stored
    try:
        traffic_log = open_traffic_log(args, append=True)
        try:
            outcome = resume_run(args.run_id, store, bench=bench, force=args.force,
                                 operator=args.operator, unattended=args.unattended,
                                 ack_safety=args.ack_safety, confirm=args.confirm,
                                 progress=not args.no_progress, traffic_log=traffic_log,
                                 echo=sys.stderr, guardian=True)
        finally:
            if traffic_log is not None:
                traffic_log.close()
    finally:
        store.close()
    return _report(outcome, args.json)


def open_traffic_log(args: argparse.Namespace, *, append: bool) -> Any:
    """The streaming traffic log of ``--traffic-log FILE`` (entries not kept in memory), or None;
    an unwritable file is a one-line InputError (exit 2) before any instrument is opened."""
    if not args.traffic_log:
        return None
    from labrun.trafficlog import TrafficLog

    return TrafficLog.stream(args.traffic_log, append=append, retain=False)
