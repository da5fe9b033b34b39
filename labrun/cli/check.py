"""``labrun check PLAN --bench BENCH``: validate a plan and dry-run it; no instrument is opened.

Reports the number of points, an estimated duration, the worst-case launched power per path, an
advisory hazard class, cap violations, the OSA settings chosen and why, and the SCPI settings the
first points send: the engine's own point loop rehearsed on simulated instruments
(``labrun.rehearse``), so they are the run's, by construction. Exit 1 on a violation or when
the rehearsed run stops at a point (a refusal or a read-back that cannot pass), 2 on bad input,
0 otherwise.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from labrun.errors import SafetyError

if TYPE_CHECKING:  # imported where used: `labrun --help` loads no numpy or pydantic
    from labrun.bench import Bench
    from labrun.plan import Plan

FIRST_POINTS = 3


def register(subparsers: Any) -> None:
    """Add the check command."""
    p = subparsers.add_parser(
        "check", help="validate a plan against a bench and dry-run it (nothing is opened)",
        description="Validate a sweep plan and dry-run it on a bench file: points, estimated "
                    "duration, worst-case launched power, advisory hazard class, cap violations, "
                    "OSA settings and the first commands. No instrument is opened.")
    p.add_argument("plan", metavar="PLAN", help="sweep plan (TOML)")
    p.add_argument("--bench", required=True, metavar="BENCH", help="bench file (TOML)")
    p.add_argument("--json", action="store_true", help="print the report as JSON on stdout")
    p.add_argument("--first", type=int, default=FIRST_POINTS, metavar="N",
                   help=f"show the commands of the first N points (default {FIRST_POINTS})")
    p.set_defaults(func=cmd_check)


def cmd_check(args: argparse.Namespace) -> int:
    """Run the check; exit 1 when the plan breaks a cap or range on this bench, or the
    rehearsed run would stop at a point."""
    from labrun.bench import load_bench
    from labrun.plan import load_plan

    plan = load_plan(args.plan)
    bench = load_bench(args.bench)
    report = dry_run(plan, bench, first=max(0, args.first))
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        print(render_text(report))
    return 1 if report["refused"] else 0  # a cap broken, or a point the run would stop at


# ----------------------------------------------------------------------------- dry run


def dry_run(plan: Plan, bench: Bench, *, first: int = FIRST_POINTS) -> dict[str, Any]:
    """Everything ``labrun check`` reports, as a JSON-friendly dict; touches no instrument.

    Unless a cap refuses the plan, the run is rehearsed by the engine itself on simulated
    instruments and a simulated clock (``labrun.rehearse``): the commands shown are the ones the
    run sends, the duration is the engine's waits plus the OSA sweeps.
    """
    from labrun import safety
    from labrun.engine import RunAborted
    from labrun.rehearse import rehearse, settings_sent

    violations = safety.check_caps(plan, bench)
    osa = plan.osa_settings(bench)
    pts = plan.points()
    scale = float(getattr(bench, "settle_scale", 1.0))
    estimated: float | None = None
    estimate: dict[str, Any] = {"settle_scale": scale}
    first_points: list[dict[str, Any]] = []
    refusal = None
    try:
        r = None if violations else rehearse(plan, bench)
    except (SafetyError, RunAborted) as exc:  # a point the engine refuses or gives up on
        r, refusal = None, str(exc)
    if r is not None:
        estimated = r.total_s
        first_s = r.points[0].seconds if r.points else 0.0
        estimate.update(settle_s=round(r.total_s - r.sweeps_s, 1),
                        osa_sweeps_s=round(r.sweeps_s, 1), sweep_s=round(r.sweep_s, 4),
                        sweep_source=r.sweep_source,
                        startup_s=round(r.opening_s + first_s, 2),
                        later_points_s=round(r.points_s - first_s, 2),
                        safe_off_s=round(r.finish_s, 2),
                        exchanges=len(r.traffic_log.entries),
                        basis="the whole run rehearsed by the engine on simulated instruments "
                              "(opening the bench, every point, the final safe-off): its settle "
                              "waits (x settle_scale) plus the OSA sweep time per sweep; the "
                              "exchanges' own round trips are not counted")
        for p in r.points[:first]:
            first_points.append({
                "index": p.spec.index, "key": p.spec.key, "setpoint": _jsonable(p.spec.setpoint),
                "is_reference": p.spec.is_reference, "repeat": p.spec.repeat,
                "wait_s": round(p.seconds - p.sweeps * r.sweep_s, 3),
                "commands": [{"role": role, "text": text}
                             for role, text in settings_sent(p.entries)]})
    wc = safety.worst_case(plan, bench)
    return {
        "plan": plan.file, "name": plan.name, "spool": plan.spool, "sha256": plan.sha256,
        "bench": bench.name, "bench_file": str(bench.path),
        "points": len(pts),
        "reference_points": sum(1 for p in pts if p.is_reference),
        "estimated_s": None if estimated is None else round(estimated, 1),
        "estimate": estimate,
        "max_launched_dbm": wc.max_launched_dbm,
        "worst_case": wc.to_dict(),
        "hazard_class": wc.hazard_class,
        "hazard_note": safety.HAZARD_NOTE,
        "violations": [v.to_dict() for v in violations],
        "refused": bool(violations) or refusal is not None,
        "refusal": refusal,
        "osa": osa.to_dict(),
        "stop_conditions": [c.describe() for c in plan.stop_conditions],
        "summary": _jsonable(plan.summary()),
        "first_points": first_points,
        "cautions": safety.CAUTIONS,
    }


def _jsonable(obj: Any) -> Any:
    """Tuples to lists, recursively, so the report is plain JSON."""
    if isinstance(obj, Mapping):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    return obj


# ----------------------------------------------------------------------------- text


def _duration(seconds: float) -> str:
    """'1 h 02 min', '3 min 20 s' or '12.3 s'."""
    if seconds >= 3600:
        return f"{int(seconds // 3600)} h {int(seconds % 3600 // 60):02d} min"
    if seconds >= 60:
        return f"{int(seconds // 60)} min {int(seconds % 60):02d} s"
    return f"{seconds:.1f} s"


def render_text(r: Mapping[str, Any]) -> str:
    """The check report for a person."""
    wc = r["worst_case"]
    ml = r["max_launched_dbm"]
    est = r["estimate"]
    if r["estimated_s"] is None:
        when = "time   not estimated: the plan is refused"
    else:
        more = max(r["points"] - 1, 0)
        when = (f"time   start-up ~{est['startup_s']:g} s (opening the bench, first point), "
                f"{more} more points ~{est['later_points_s']:g} s, safe-off ~"
                f"{est['safe_off_s']:g} s: total about {_duration(r['estimated_s'])}\n"
                f"       (settling {est['settle_s']} s, OSA sweeps {est['osa_sweeps_s']} s at "
                f"{est['sweep_s']:g} s each from the {est['sweep_source']}, settle_scale "
                f"{est['settle_scale']:g}; {est['exchanges']} exchanges, their round trips "
                "not counted)")
    out = [
        f"plan   {r['plan']}: {r['name']} (spool {r['spool']})",
        f"bench  {r['bench_file']}: {r['bench']}",
        f"points {r['points']} ({r['reference_points']} reference)",
        when,
        "worst-case launched power into the spool (after calibration):",
    ]
    out += [f"  path {k}: {v:.2f} dBm" for k, v in ml.items() if k != "total"]
    out.append(f"  total : {ml['total']:.2f} dBm   (the plan itself asks for at most "
               f"{wc['planned_dbm']['total']:.2f} dBm)")
    srcs = ", ".join(f"{k} {v:.2f} dBm" for k, v in wc["source_dbm"].items())
    out.append(f"sources at {srcs}; highest power on the bench {wc['highest_dbm']:.2f} dBm")
    out.append(f"hazard {r['hazard_class']} (advisory). {r['hazard_note']}")
    osa = r["osa"]
    follow = ", centre follows the pump" if osa["per_point_center"] else ""
    out.append(f"OSA    centre {osa['center_nm']} nm, span {osa['span_nm']} nm, RBW "
               f"{osa['rbw_nm']} nm, {osa['points']} samples, ~{osa['sweep_estimate_s']} s per "
               f"sweep{follow}")
    out.append(f"       why: {osa['reason']}")
    out += [f"       warning: {w}" for w in osa["warnings"]]
    if r["stop_conditions"]:
        out.append("stop   " + "; ".join(r["stop_conditions"]))
    for fp in r["first_points"]:
        tag = " (reference)" if fp.get("is_reference") else ""
        out.append(f"point {fp['index']}{tag}: {fp['key']}")
        if "refused" in fp:
            out.append(f"  refused: {fp['refused']}")
        for c in fp["commands"]:
            out.append(f"  {c['role']:<15} {c['text']}")
    if r["violations"]:
        out.append(f"REFUSED: {len(r['violations'])} violation(s):")
        out += [f"  - {v['message']}" for v in r["violations"]]
    else:
        out.append("OK: no cap or range violated (nothing was opened or sent)")
    out.append("")
    out.append(r["cautions"].rstrip())
    return "\n".join(out)

