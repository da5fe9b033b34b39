"""``labrun demo``: the whole job on the virtual lab, end to end, in about a minute or less.

Starts the simulated bench in-process (instruments on loopback TCP, reached through pyvisa like
hardware), runs a shipped power sweep unattended into a SQLite file, fits the spool and draws
the plots a lab engineer would look at first. No light is emitted: every instrument is simulated.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labrun.errors import InputError
from labrun.resources import find_file

if TYPE_CHECKING:
    from labrun.bench import Bench

DEMO_DB = "labrun-demo.db"
DEMO_OUT = "labrun-demo"


def register(subparsers: Any) -> None:
    """Add the demo command."""
    p = subparsers.add_parser(
        "demo", help="run a power sweep on the virtual lab, store it, fit it, plot it",
        description="Rehearse the main job on simulated instruments: start the virtual lab, run "
                    "a sweep plan unattended into a SQLite file, fit the spool, write plots. "
                    "No real instrument is touched and no light is emitted.")
    p.add_argument("--plan", default="power-sweep.toml", metavar="PLAN",
                   help="sweep plan (default: the shipped power-sweep.toml)")
    p.add_argument("--scenario", default="default-scenario.toml", metavar="FILE",
                   help="virtual-lab scenario (default: the shipped default-scenario.toml)")
    p.add_argument("--db", default=DEMO_DB, metavar="URL_OR_PATH",
                   help=f"run store (default: {DEMO_DB} in the current folder)")
    p.add_argument("--out", default=DEMO_OUT, metavar="DIR",
                   help=f"folder for the bench file, plots and fit results (default: {DEMO_OUT})")
    p.add_argument("--time-scale", type=float, default=0.0, metavar="X",
                   help="simulated instrument time (settling, OSA sweeps) x this factor; 0 = none")
    p.add_argument("--seed", type=int, default=1, metavar="N", help="virtual-lab random seed")
    p.add_argument("--json", action="store_true", help="print run outcome and fits as JSON")
    p.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    p.set_defaults(func=cmd_demo)


def _resolve(name: str, kind: str, field: str) -> Path:
    path = find_file(name, kind, suffixes=("", ".toml"))
    if path is None:
        raise InputError(f"no such file (looked in the current folder and in shipped {kind}/)",
                         file=name, field=field)
    return path


def cmd_demo(args: argparse.Namespace) -> int:
    """Run the demo; exit code of the run (0 when it completed)."""
    from labrun.bench import load_bench
    from labrun.engine import run_plan
    from labrun.plan import load_plan
    from labrun.safety import CAUTIONS
    from labrun.store import open_store
    from labrun.vlab import VirtualLab
    from labrun.vlab.scenario import load_scenario

    if not 0 <= args.time_scale <= 1e6:  # NaN and infinity fail too
        raise InputError(f"{args.time_scale:g} is outside [0, 1e6]", field="--time-scale")
    plan = load_plan(_resolve(args.plan, "sweeps", "--plan"))
    scenario = load_scenario(_resolve(args.scenario, "sim_instruments", "--scenario"))
    if plan.spool in {sp.name for sp in scenario.spools}:  # splice in the spool the plan names
        scenario = scenario.model_copy(update={"connected": plan.spool})
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the output folder: {exc.strerror}", file=args.out,
                         field="--out") from None
    say = (lambda *a: None) if args.json else (lambda *a: print(*a, file=sys.stderr))
    say("labrun demo: virtual lab only -- no instrument is touched and no light is emitted.")
    say("On a real bench these cautions apply:\n" + CAUTIONS.rstrip())
    store = open_store(args.db)
    try:
        with VirtualLab(scenario, time_scale=args.time_scale, seed=args.seed) as lab:
            bench = load_bench(lab.write_bench(out / "virtual-bench.toml"))
            say(f"virtual lab up: {len(lab.servers)} instruments on 127.0.0.1; "
                f"spool {scenario.connected}; plan '{plan.name}', {len(plan.points())} points")
            outcome = run_plan(plan, bench, store, operator="demo (virtual lab)",
                               unattended=True, ack_safety=True,
                               progress=not (args.no_progress or args.json))
        if outcome.status == "interrupted":  # Ctrl-C: the user wants out, not fits and plots
            if args.json:
                print(json.dumps({"run": outcome.to_dict()}, indent=2))
            else:
                print(f"run {outcome.run_id}: interrupted, {outcome.points_done}/"
                      f"{outcome.points_total} points stored in {args.db} (no fits and no "
                      "report for an interrupted demo)")
            return outcome.exit_code
        report = _fit_and_plot(store, outcome.run_id, scenario, bench, out)
        page = _write_report(store, outcome.run_id, out)
        report["report"] = str(page)
    finally:
        store.close()
    if args.json:
        print(json.dumps({"run": outcome.to_dict(), **report}, indent=2))
    else:
        _print_report(outcome, report, args.db)
        print(f"report: {page}")
    return outcome.exit_code


def _write_report(store: Any, run_id: int, out: Path) -> Path:
    """The run's HTML page (``labrun report``) in the output folder."""
    from labrun.report import write_report

    return write_report(store, out / "report.html", run_id=run_id).resolve()


def _fit_and_plot(store: Any, run_id: int, scenario: Any, bench: Bench,
                  out: Path) -> dict[str, Any]:
    """Fit the stored points, write plots and fits.json; returns what was written."""
    from labrun.fits import PolFrame, fit_run
    from labrun.plots import plot_power_slopes, plot_trace
    from labrun.queries import point_trace, run_points
    from labrun.reduce import reduce_trace
    from labrun.uncertainty import Uncertainties

    spool = scenario.spool()
    table = run_points(store, run_id, include_reference=False)
    report: dict[str, Any] = {"spool": spool.name, "model_gamma_per_w_per_km":
                              spool.gamma_per_w_per_km, "fits": {}, "files": []}
    if table.empty:
        return report
    fits = fit_run(table, spool.length_km, spool.loss_db_per_km,
                   dispersion_ps_per_nm_km=spool.dispersion_ps_per_nm_km,
                   polarisation=PolFrame.from_bench(bench.polarisation),
                   uncertainties=Uncertainties.from_calibration(bench.calibration))
    report["fits"] = {name: fit.to_dict() for name, fit in fits.items()}
    (out / "fits.json").write_text(json.dumps(report["fits"], indent=2))
    report["files"].append(str(out / "fits.json"))

    last = table.iloc[-1]
    x, y, rbw = point_trace(store, int(last["point_id"]))
    red = reduce_trace(x, y, rbw or 0.02, orders=3)
    report["files"].append(str(plot_trace(
        out / "last-trace.png", x, y, red,
        title=f"{spool.name}: launched {last['power_a_dbm']:+.1f} / {last['power_b_dbm']:+.1f} "
              f"dBm, {red.spacing_ghz:.1f} GHz")))
    report["files"].append(str(plot_power_slopes(out / "sideband-vs-power.png", table, fits)))
    return report


def _print_report(outcome: Any, report: dict[str, Any], db: str) -> None:
    """Human summary on stdout: how the run ended, the fits, where the files are."""
    from labrun.spoolfits import GUM_K2, STUDENT_T95, U_LEGEND, u_label
    from labrun.uncertainty import budget_text

    print(f"run {outcome.run_id}: {outcome.status}, {outcome.points_done}/{outcome.points_total} "
          f"points stored in {db}")
    print(f"spool {report['spool']} (virtual lab model gamma = "
          f"{report['model_gamma_per_w_per_km']:g} 1/(W km))")
    for name, fit in report["fits"].items():
        if fit["value"] is None:
            print(f"  {name:<22} not fitted")
        else:
            err = f" +/- {fit['stderr']:.3g}" if fit["stderr"] is not None else ""
            kind = GUM_K2 if fit.get("budget") else STUDENT_T95  # a fit's own: budget or not
            u95 = f", {u_label(kind)} {fit['u95']:.3g}" if fit.get("u95") is not None else ""
            print(f"  {name:<22} {fit['value']:.4g}{err} {fit['unit']}{u95}  "
                  f"({fit['n_points']} points, {fit['model'].split(':')[0]})")
            if name.startswith(("gamma", "dispersion")) and fit.get("budget"):
                print(budget_text(name, fit))
        for note in fit.get("warnings", []):
            print(f"    ! {note}")
    print(f"  (+/- is the statistical standard error of the fit; {U_LEGEND}; the budgets above "
          "come from the bench's calibration uncertainties)")
    for path in report["files"]:
        print(f"  wrote {path}")
