"""``labrun demo``: the whole job on the virtual lab, end to end, in about a minute or less.

Starts the simulated bench in-process (instruments on loopback TCP, reached through pyvisa like
hardware), runs a shipped power sweep unattended into a SQLite file, records a data-sheet-like D
on the spool (invented, said so), fits the run as ``labrun fit`` does and draws the plots a lab
engineer would look at first. No light is emitted: every instrument is simulated.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from labrun.errors import InputError
from labrun.resources import find_file

DEMO_DB = "labrun-demo.db"
DEMO_OUT = "labrun-demo"


def register(subparsers: Any) -> None:
    """Add the demo command."""
    p = subparsers.add_parser(
        "demo", help="run a power sweep on the virtual lab, store it, fit it, plot it",
        description="Rehearse the main job on simulated instruments: start the virtual lab, run "
                    "a sweep plan unattended into a SQLite file, record a data-sheet-like D on "
                    "the spool (invented: the virtual lab's D with a stated u of 0.1 ps/(nm km); "
                    "a D already on record is kept), fit the run as labrun fit does, write "
                    "plots. "
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
        report = _fit_and_plot(store, outcome.run_id, scenario, out)
        page = _write_report(store, outcome.run_id, out)
        report["report"] = str(page)
    finally:
        store.close()
    if args.json:
        shown = {k: v for k, v in report.items() if k != "record"}
        print(json.dumps({"run": outcome.to_dict(), **shown}, indent=2))
    else:
        _print_report(outcome, report, args.db)
        print(f"report: {page}")
    return outcome.exit_code


def _write_report(store: Any, run_id: int, out: Path) -> Path:
    """The run's HTML page (``labrun report``) in the output folder."""
    from labrun.report import write_report

    return write_report(store, out / "report.html", run_id=run_id).resolve()


DEMO_D_U = 0.1  # ps/(nm km): the stated standard uncertainty of the demo spool's D, as a data
# sheet of a highly nonlinear fibre might give it (invented for the demo)


def _record_demo_dispersion(store: Any, scenario: Any) -> tuple[Any, str]:
    """Put a data-sheet-like D on the demo spool's record, as a lab would with ``labrun spool
    set --dispersion`` (invented: the virtual lab's D with a stated u of DEMO_D_U, slope taken as
    exact); a D already on record is kept. Returns the D used and a line saying which."""
    from sqlalchemy import select

    from labrun.spoolfits import DISPERSION_KEY, GivenDispersion
    from labrun.store.models import Spool

    spool = scenario.spool()
    invented = GivenDispersion(spool.dispersion_ps_per_nm_km, DEMO_D_U,
                               spool.dispersion_slope_ps_per_nm2_km, 0.0,
                               spool.reference_wavelength_nm)
    # fills only what the row does not say yet (a plan without a [spool] table: the lab's own)
    store.spool_id(spool.name, length_km=spool.length_km, loss_db_per_km=spool.loss_db_per_km,
                   params={DISPERSION_KEY: invented.to_params()})
    with store.session() as s:
        given = GivenDispersion.of(s.scalar(select(Spool).where(Spool.label == spool.name)))
    if given is None or given == invented:  # None: spool_id wrote it, so never (for mypy)
        given = invented
        return given, (f"spool {spool.name}: recorded {given.text()} on the spool record, as a "
                       "data sheet would give it (invented for the demo: the virtual lab's D "
                       f"with a stated standard uncertainty of {DEMO_D_U:g}; a lab does this "
                       f"with labrun spool set {spool.name} --dispersion D --dispersion-u U)")
    return given, f"spool {spool.name}: the spool record's {given.text()} is kept and used"


def _fit_and_plot(store: Any, run_id: int, scenario: Any, out: Path) -> dict[str, Any]:
    """Fit the run as ``labrun fit`` does (labrun.spoolfits, with the D on the spool record),
    store the fit, write plots and fits.json; returns what was written."""
    from labrun.plots import plot_power_slopes, plot_trace
    from labrun.queries import point_trace, run_points
    from labrun.reduce import reduce_trace
    from labrun.spoolfits import fit_runs

    spool = scenario.spool()
    table = run_points(store, run_id, include_reference=False)
    report: dict[str, Any] = {"spool": spool.name, "model_gamma_per_w_per_km":
                              spool.gamma_per_w_per_km, "fits": {}, "files": []}
    if table.empty:
        return report
    given, said = _record_demo_dispersion(store, scenario)
    report["dispersion_record"] = {**given.to_params(), "note": said}
    record = fit_runs(store, [run_id])
    report["fit"] = record.to_dict()
    report["fits"] = report["fit"]["parameters"]
    report["record"] = record
    (out / "fits.json").write_text(json.dumps(report["fit"], indent=2))
    report["files"].append(str(out / "fits.json"))

    last = table.iloc[-1]
    x, y, rbw = point_trace(store, int(last["point_id"]))
    red = reduce_trace(x, y, rbw or 0.02, orders=3)
    report["files"].append(str(plot_trace(
        out / "last-trace.png", x, y, red,
        title=f"{spool.name}: launched {last['power_a_dbm']:+.1f} / {last['power_b_dbm']:+.1f} "
              f"dBm, {red.spacing_ghz:.1f} GHz")))
    report["files"].append(str(plot_power_slopes(out / "sideband-vs-power.png", table,
                                                 record.parameters)))
    return report


def _print_report(outcome: Any, report: dict[str, Any], db: str) -> None:
    """Human summary on stdout: how the run ended, the D used, the fit as ``labrun fit`` prints
    it, where the files are."""
    from labrun.cli.fit import fit_text

    print(f"run {outcome.run_id}: {outcome.status}, {outcome.points_done}/{outcome.points_total} "
          f"points stored in {db}")
    print(f"spool {report['spool']} (virtual lab model gamma = "
          f"{report['model_gamma_per_w_per_km']:g} 1/(W km))")
    if report.get("dispersion_record"):
        print(report["dispersion_record"]["note"])
    if report.get("record") is not None:
        print(fit_text(report["record"]))
        print(f"  (the same as labrun fit {outcome.run_id} --db {db} prints)")
    for path in report["files"]:
        print(f"  wrote {path}")
