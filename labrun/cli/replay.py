"""``labrun replay``: a stored run played again with no lab: from its recorded traffic, or on a
virtual lab of its bench around a model of the spool (its fitted twin, or a scenario's spool)."""

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
        description="Replay a stored run as a new run linked to it; everything is virtual, no "
                    "light is emitted. --twin or --scenario FILE --spool NAME: the stored plan is "
                    "measured point by point on a virtual lab of the run's bench around that "
                    "spool, and the residuals (measured minus replayed) are judged against the "
                    "combined uncertainty. --traffic-log FILE: the run's recorded instrument "
                    "traffic is played back through a simulated VISA backend; the lines must "
                    "equal the original's bit for bit, and a command that differs from the "
                    "recording stops the replay.")
    p.add_argument("run_id", metavar="RUN_ID", type=int, help="run id (see 'labrun status')")
    how = p.add_mutually_exclusive_group(required=True)
    how.add_argument("--twin", action="store_true",
                     help="model the spool by its headline fit, as labrun spools shows it "
                          "(the run's own fit if none stored)")
    how.add_argument("--scenario", metavar="FILE",
                     help="model the spool by one of a virtual-lab scenario's (with --spool)")
    how.add_argument("--traffic-log", metavar="FILE", nargs="?", const="",
                     help="play back the run's traffic log (from 'labrun run --traffic-log'; "
                          "without FILE, the file the run recorded it streamed to)")
    p.add_argument("--spool", metavar="NAME", help="the scenario's spool to replay against")
    p.add_argument("--time-scale", type=float, default=0.0, metavar="X",
                   help="virtual lab time scale (0: as fast as possible, 1: real time)")
    p.add_argument("--seed", type=int, default=0, metavar="N",
                   help="seed of the virtual lab's imperfections (with --scenario)")
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")
    p.add_argument("--json", action="store_true", help="print the outcome as JSON on stdout")
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    p.set_defaults(func=cmd_replay)


def cmd_replay(args: argparse.Namespace) -> int:
    """Replay, print the outcome. Exit 0: the log reproduced the run, or the run is consistent
    with the model; 1 otherwise."""
    from pathlib import Path

    from labrun.errors import InputError

    if args.traffic_log and not Path(args.traffic_log).is_file():
        raise InputError("no such traffic log", file=args.traffic_log, field="--traffic-log")
    if args.scenario is not None and not args.spool:
        raise InputError("--scenario needs --spool NAME", field="--spool")
    if args.spool and args.scenario is None:
        raise InputError("--spool goes with --scenario FILE", field="--spool")
    if not 0 <= args.time_scale <= 1e6:  # NaN and infinity fail too
        raise InputError(f"{args.time_scale:g} is outside [0, 1e6]", field="--time-scale")
    if args.traffic_log is not None:
        return _traffic(args)
    return _model(args)


def _traffic(args: argparse.Namespace) -> int:
    """--traffic-log: play the recording back."""
    from labrun.replay import replay_traffic, stored_traffic_log
    from labrun.store import open_existing_store

    store = open_existing_store(args.db, upgrade=True)
    try:
        log = args.traffic_log or stored_traffic_log(store, args.run_id)
        result = replay_traffic(store, args.run_id, log,
                                progress=not (args.no_progress or args.json))
    finally:
        store.close()
    _show(result.to_dict(), args.json)
    return 0 if result.identical else 1


def _model(args: argparse.Namespace) -> int:
    """--twin / --scenario: measure the plan again on a model and judge the residuals."""
    from labrun.replay import original_run, replay_model, scenario_spool, twin_spool
    from labrun.store import open_existing_store

    base = None
    if args.scenario is not None:
        spool, base = scenario_spool(args.scenario, args.spool)
    store = open_existing_store(args.db, upgrade=True)
    try:
        if args.twin:
            spool = twin_spool(store, original_run(store, args.run_id))
        print("labrun replay: virtual lab only -- no instrument is touched and no light is "
              "emitted.", file=sys.stderr)
        result = replay_model(store, args.run_id, spool=spool, base_scenario=base,
                              time_scale=args.time_scale, seed=args.seed,
                              progress=not (args.no_progress or args.json))
    finally:
        store.close()
    out = result.to_dict()
    if args.json:
        for note in out["warnings"]:
            print(f"labrun replay: WARNING: {note}", file=sys.stderr)
        print(json.dumps(out, indent=2))
    else:
        print(model_text(out))
    return 0 if result.verdict == "consistent" else 1


def model_text(out: dict[str, Any]) -> str:
    """The residual summary and verdict for people."""
    text = [f"run {out['run_id']}: VIRTUAL replay of run {out['replay_of']} ({out['status']}, "
            f"{out['points_compared']} points compared)", f"  model: {out['model']}",
            *([f"  fit used: {out['model_why']}"] if out.get("model_why") else []),
            *(f"  WARNING: {note}" for note in out.get("warnings", [])),
            "  residual = measured - replayed, dB (u_c: combined standard uncertainty)",
            f"  {'line':<16} {'n':>4} {'mean':>8} {'rms':>7} {'max':>7} {'u_c':>6} "
            f"{'dB/h':>8} {'dB/dB':>7}  ok"]
    for key, ln in out["residual_db"].items():
        def f(v: Any, w: int, d: int) -> str:
            return f"{v:>{w}.{d}f}" if v is not None else f"{'-':>{w}}"
        text.append(f"  {key:<16} {ln['n']:>4} {f(ln['mean'], 8, 3)} {f(ln['rms'], 7, 3)} "
                    f"{f(ln['max'], 7, 3)} {f(ln['u_c'], 6, 3)} {f(ln['per_hour'], 8, 3)} "
                    f"{f(ln['per_db'], 7, 3)}  {'yes' if ln['consistent'] else 'NO'}")
    for name, agg in out["residual_by_order"].items():
        text.append(f"  {name:<16} {agg['n']:>4} {'':>8} {agg['rms']:>7.3f} {agg['max']:>7.3f}")
    keys = list(out["residual_db"])
    if out["per_point"]:
        text.append("  per point (measured - replayed, dB):")
        text.append("  " + " ".join(f"{k:>16}" for k in keys) + "  point")
        for row in out["per_point"]:
            text.append("  " + " ".join(f"{row[k]:>16.3f}" if row.get(k) is not None
                                        else f"{'-':>16}" for k in keys) + f"  {row['key']}")
    text.append(f"verdict: {out['verdict']} ({out['reason']})")
    return "\n".join(text)


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
