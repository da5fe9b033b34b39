"""``labrun check PLAN --bench BENCH``: validate a plan and dry-run it; no instrument is opened.

Reports the number of points, an estimated duration, the worst-case launched power per path, an
advisory hazard class, cap violations, the OSA settings chosen and why, and the SCPI commands the
first points would send (rendered from the profiles, not sent). Exit 1 on a violation, 2 on bad
input, 0 otherwise.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from labrun.errors import SafetyError

if TYPE_CHECKING:  # imported where used: `labrun --help` loads no numpy or pydantic
    from labrun.plan import OsaSettings, Plan

FIRST_POINTS = 3


@dataclass(frozen=True)
class Step:
    """One setting a point needs: role, profile operation, value, and which setpoint drives it."""

    role: str
    op: str
    value: Any
    drives: tuple[str, ...]
    index: int | None = None


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
    """Run the check; exit 1 when the plan breaks a cap or range on this bench."""
    from labrun.bench import load_bench
    from labrun.plan import load_plan

    plan = load_plan(args.plan)
    bench = load_bench(args.bench)
    report = dry_run(plan, bench, first=max(0, args.first))
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        print(render_text(report))
    return 1 if report["violations"] else 0


# ----------------------------------------------------------------------------- dry run


def point_steps(setpoint: Mapping[str, Any], bench: Any) -> list[Step]:
    """Settings of one point, in the engine's terms (roles, profile operations, values)."""
    from labrun import safety
    from labrun.plan import POWER_SETPOINTS as POWER_AXES

    inst = safety.instrument_settings(setpoint, bench)
    wl = ("wavelength_a_nm",)
    steps = [
        Step("laser_a", "set_wavelength_nm", inst.wavelength_a_nm, wl),
        Step("laser_b", "set_wavelength_nm", inst.wavelength_b_nm, (*wl, "spacing_ghz")),
        Step("attenuator_a", "set_wavelength_nm", inst.wavelength_a_nm, wl),
        Step("attenuator_b", "set_wavelength_nm", inst.wavelength_b_nm, (*wl, "spacing_ghz")),
        Step("laser_a", "set_power_dbm", inst.laser_a_dbm, POWER_AXES),
        Step("laser_b", "set_power_dbm", inst.laser_b_dbm, POWER_AXES),
        Step("attenuator_a", "set_attenuation_db", inst.attenuation_a_db, POWER_AXES),
        Step("attenuator_b", "set_attenuation_db", inst.attenuation_b_db, POWER_AXES),
    ]
    if inst.amplifier_dbm is not None:
        steps.append(Step("amplifier", "set_power_dbm", inst.amplifier_dbm, POWER_AXES))
    if setpoint.get("pol_angles_deg") is not None:
        for i, ang in enumerate(setpoint["pol_angles_deg"], start=1):
            steps.append(Step("pol_controller", "set_angle_deg", ang, ("pol_angles_deg",), i))
    if setpoint.get("pol_stokes") is not None:
        steps.append(Step("pol_controller", "set_stokes", tuple(setpoint["pol_stokes"]),
                          ("pol_stokes",)))
    return [s for s in steps if s.role in bench.instruments]


def _settle(bench: Any, plan: Plan, step: Step) -> float:
    """Settle time of a step: the larger of its profile operation's and its plan axes'."""
    from labrun.plan import op_settle

    axis_s = max([plan.settle_s.get(d, 0.0) for d in step.drives] + [0.0])
    return max(op_settle(bench, step.role, step.op), axis_s)


def _render(bench: Any, role: str, op_name: str, value: Any = None,
            index: int | None = None) -> str | None:
    """SCPI text of one operation from the role's profile (None when the profile lacks it)."""
    from labrun.profiles import VALUE_PLACEHOLDERS

    spec = bench.instruments.get(role)
    op = spec.profile.operations.get(op_name) if spec else None
    if op is None:
        return None
    kwargs: dict[str, Any] = {}
    if op_name in VALUE_PLACEHOLDERS:
        kwargs = dict(zip(VALUE_PLACEHOLDERS[op_name], (float(v) for v in value), strict=True))
    elif value is not None:
        kwargs["value"] = int(value) if op.integer else float(value)
    if index is not None:
        kwargs["index"] = index
    try:
        return op.render(**kwargs)
    except (KeyError, ValueError, IndexError):
        return f"{op.template} <{value}>"


def _osa_steps(osa: OsaSettings) -> list[tuple[str, Any]]:
    """OSA operations and values for one configuration."""
    return [("set_center_nm", osa.center_nm), ("set_span_nm", osa.span_nm),
            ("set_rbw_nm", osa.rbw_nm), ("set_points", osa.points)]


def dry_run(plan: Plan, bench: Any, *, first: int = FIRST_POINTS) -> dict[str, Any]:
    """Everything ``labrun check`` reports, as a JSON-friendly dict; touches no instrument."""
    from labrun import safety
    from labrun.plan import op_settle

    violations = safety.check_caps(plan, bench)
    osa = plan.osa_settings(bench)
    pts = plan.points()
    scale = float(getattr(bench, "settle_scale", 1.0))
    applied: dict[tuple[str, str, int | None], Any] = {}
    osa_applied: tuple[Any, ...] | None = None
    settle_total = sweep_total = 0.0
    first_points: list[dict[str, Any]] = []
    refused = bool(violations)
    for n, p in enumerate(pts):
        cmds: list[dict[str, Any]] = []
        try:
            steps = point_steps({**p.setpoint, "amplifier": plan.amplifier}, bench)
        except SafetyError as exc:
            refused = True
            if n < first:
                first_points.append({"index": p.index, "key": p.key, "setpoint": p.setpoint,
                                     "refused": str(exc), "commands": []})
            continue
        wait = 0.0
        this_osa = osa.for_point(p.setpoint)
        osa_now = tuple(v for _, v in _osa_steps(this_osa))
        if osa_now != osa_applied:
            for op_name, value in _osa_steps(this_osa):
                cmds.append({"role": "osa", "text": _render(bench, "osa", op_name, value)})
            osa_applied = osa_now
        for s in steps:
            tag = (s.role, s.op, s.index)
            if applied.get(tag) == s.value:
                continue
            applied[tag] = s.value
            wait = max(wait, _settle(bench, plan, s))
            cmds.append({"role": s.role, "text": _render(bench, s.role, s.op, s.value, s.index)})
        if n == 0:
            for role in ("attenuator_a", "attenuator_b", "laser_a", "laser_b", "amplifier"):
                if role == "amplifier" and not plan.amplifier:
                    continue
                text = _render(bench, role, "output_on")
                if text:
                    cmds.append({"role": role, "text": text})
                    wait = max(wait, op_settle(bench, role, "output_on"))
        sweeps = 1
        if plan.capture_input and n % plan.osa.input_every == 0:
            sweeps = 2
            wait += 2 * op_settle(bench, "switch", "set_path")
            cmds.append({"role": "switch", "text": _render(bench, "switch", "set_path", 2)})
            cmds.append({"role": "osa", "text": _render(bench, "osa", "sweep")})
            cmds.append({"role": "switch", "text": _render(bench, "switch", "set_path", 1)})
        elif n == 0 and "switch" in bench.instruments:
            # the engine routes the OSA to the spool output once before the first sweep
            wait += op_settle(bench, "switch", "set_path")
            cmds.append({"role": "switch", "text": _render(bench, "switch", "set_path", 1)})
        cmds.append({"role": "osa", "text": _render(bench, "osa", "sweep")})
        settle_total += wait * scale
        sweep_total += sweeps * osa.sweep_estimate_s
        if n < first:
            first_points.append({"index": p.index, "key": p.key, "setpoint": _jsonable(p.setpoint),
                                 "is_reference": p.is_reference, "repeat": p.repeat,
                                 "wait_s": round(wait * scale, 3),
                                 "commands": [c for c in cmds if c["text"]]})
    wc = safety.worst_case(plan, bench)
    return {
        "plan": plan.file, "name": plan.name, "spool": plan.spool, "sha256": plan.sha256,
        "bench": bench.name, "bench_file": str(bench.path),
        "points": len(pts),
        "reference_points": sum(1 for p in pts if p.is_reference),
        "estimated_s": round(settle_total + sweep_total, 1),
        "estimate": {"settle_s": round(settle_total, 1), "osa_sweeps_s": round(sweep_total, 1),
                     "settle_scale": scale,
                     "basis": "profile and per-axis settle times (overlapping within a point, "
                              "x settle_scale) plus the OSA sweep estimate per sweep"},
        "max_launched_dbm": wc.max_launched_dbm,
        "worst_case": wc.to_dict(),
        "hazard_class": wc.hazard_class,
        "hazard_note": safety.HAZARD_NOTE,
        "violations": [v.to_dict() for v in violations],
        "refused": refused,
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
    out = [
        f"plan   {r['plan']}: {r['name']} (spool {r['spool']})",
        f"bench  {r['bench_file']}: {r['bench']}",
        f"points {r['points']} ({r['reference_points']} reference)",
        f"time   about {_duration(r['estimated_s'])} (settling {r['estimate']['settle_s']} s, "
        f"OSA sweeps {r['estimate']['osa_sweeps_s']} s, settle_scale "
        f"{r['estimate']['settle_scale']:g})",
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

