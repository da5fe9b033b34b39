"""Replay a stored run: its recorded traffic played back, or its plan measured on a model.

Both store a new run linked to the original (a ``replay`` event with ``replay_of``) and run the
same engine (settings, sweeps, reduction, checks, storage) as a night in the lab; no light is
emitted. ``replay_traffic`` serves the original's traffic log through ``visareplay`` and checks
that the replayed lines equal the original's bit for bit. ``replay_model`` (labrun.replay_model)
measures the plan on a virtual lab and compares.
"""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd
from sqlalchemy import or_, select

from labrun.errors import InputError
from labrun.roles import ROLE_KINDS
from labrun.store import Line, Point, Store, Trace

if TYPE_CHECKING:
    from labrun.bench import Bench

# Line columns compared bit for bit between a run and its replay.
LINE_FIELDS = ("kind", "side", "order", "freq_thz", "wavelength_nm", "power_dbm", "floor_dbm",
               "snr_db", "detected", "upper_limit_dbm")


@dataclass
class TrafficReplay:
    """Outcome of a traffic-log replay; ``to_dict`` is the ``--json`` output."""

    run_id: int
    replay_of: int
    status: str
    points_done: int
    points_total: int
    identical: bool
    differences: list[str] = field(default_factory=list)
    unused_exchanges: int = 0
    reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary."""
        return dataclasses.asdict(self)


def _read_tap(store: Store, run_id: int) -> bool:
    """True when the run's first stored point holds an input-tap power reading (the engine
    reads the tap power meter on every point since it could; a replay asks what it asked)."""
    from labrun.commit import TAP_KEY

    with store.session() as s:
        applied = s.execute(select(Point.applied).where(Point.run_id == run_id)
                            .order_by(Point.index).limit(1)).scalar()
    return applied is not None and TAP_KEY in applied


def original_run(store: Store, run_id: int) -> Any:
    """The run to replay (InputError naming RUN_ID when there is none)."""
    run = store.get_run(run_id)
    if run is None:
        raise InputError(f"no run {run_id} in {store.url}", field="RUN_ID")
    return run


def stored_bench(run: Any, *, settle_scale: float | None = None) -> Any:
    """The run's bench rebuilt from its stored text (profiles and sim files resolved beside the
    original bench file, else from the shipped folders); ``settle_scale`` replaces its own."""
    from labrun.bench import parse_bench

    where = Path(run.bench_path) if run.bench_path else Path(f"<run {run.id} bench>")
    bench = parse_bench(run.bench_text, where)
    if settle_scale is not None:
        bench = dataclasses.replace(bench, settle_scale=float(settle_scale))
    return bench


def stored_plan(run: Any) -> Any:
    """The run's plan from its stored text (hash checked; the file on disk is not needed)."""
    from labrun.engine import plan_from_run

    return plan_from_run(dataclasses.replace(_RunView.of(run), plan_path=None), force=False)


@dataclass
class _RunView:
    """The few run columns plan_from_run reads (a detached copy we may change)."""

    id: int
    plan_text: str
    plan_sha256: str
    plan_path: str | None

    @classmethod
    def of(cls, run: Any) -> _RunView:
        return cls(run.id, run.plan_text, run.plan_sha256, run.plan_path)


def point_lines(store: Store, run_id: int) -> dict[str, list[tuple[Any, ...]]]:
    """Per point key, the spool-output lines of a run as tuples of LINE_FIELDS (stored order)."""
    with store.session() as s:
        rows = s.execute(
            select(Point.key, *(getattr(Line, f) for f in LINE_FIELDS))
            .join(Point, Point.id == Line.point_id)
            .outerjoin(Trace, Trace.id == Line.trace_id)
            .where(Point.run_id == run_id, or_(Trace.kind.is_(None), Trace.kind == "output"))
            .order_by(Point.index, Line.id)).all()
    out: dict[str, list[tuple[Any, ...]]] = {}
    for row in rows:
        out.setdefault(row[0], []).append(tuple(row[1:]))
    return out


def line_differences(store: Store, original: int, replay: int, *, limit: int = 20) -> list[str]:
    """Where the replay's lines differ from the original's (exact comparison, NaN-free columns:
    the store keeps non-finite values as NULL); empty when identical."""
    a, b = point_lines(store, original), point_lines(store, replay)
    diffs: list[str] = []
    for key in list(a) + [k for k in b if k not in a]:
        if a.get(key) == b.get(key):
            continue
        if key not in b:
            diffs.append(f"point {key}: not in the replay")
        elif key not in a:
            diffs.append(f"point {key}: not in the original")
        else:
            for la, lb in zip(a[key], b[key], strict=False):
                if la != lb:
                    fields = [f for f, x, y in zip(LINE_FIELDS, la, lb, strict=True) if x != y]
                    diffs.append(f"point {key}: {la[0]} {la[1]} {la[2]} differs in "
                                 f"{', '.join(fields)}")
            if len(a[key]) != len(b[key]):
                diffs.append(f"point {key}: {len(a[key])} lines, replay {len(b[key])}")
        if len(diffs) >= limit:
            break
    return diffs[:limit]


def replay_traffic(store: Store, run_id: int, log_path: str | Path, *,
                   progress: bool = False) -> TrafficReplay:
    """Replay run ``run_id`` from its traffic log: same bench and plan, the recorded answers
    served in order by a simulated VISA backend; a new run, compared line for line.

    A message that differs from the recording raises ``TrafficMismatch`` naming the point, the
    instrument, the expected and the actual message (the replay run is stored as failed).
    """
    from labrun.engine import RetryPolicy, run_virtual
    from labrun.visareplay import TrafficMismatch, replaying

    run = original_run(store, run_id)
    log = _load_log(log_path)
    plan = stored_plan(run)
    plan.tap_power = _read_tap(store, run_id)  # as the original did (older runs did not)
    # The bench's own settle scale: it decides how settings and their checks are grouped into
    # messages, so a replay waits the settle times the original waited (not the instruments'
    # own times). The retry policy is the original's, so a recorded fault is retried as it was.
    bench = stored_bench(run)
    policy = RetryPolicy(**{**(run.settings or {}).get("retry", {}), "backoff_s": 0.0})
    created: list[int] = []
    with replaying(log.entries) as lib:
        try:
            outcome = run_virtual(plan, bench, store, replay_of=run_id, mode="traffic log",
                                  policy=policy, progress=progress, created=created.append)
        except TrafficMismatch as exc:
            if created:
                exc.point = _current_point(store, created[0], plan)
                store.update_run(created[0], reason=str(exc))
            raise
    diffs = line_differences(store, run_id, outcome.run_id)
    return TrafficReplay(run_id=outcome.run_id, replay_of=run_id, status=outcome.status,
                         points_done=outcome.points_done, points_total=outcome.points_total,
                         identical=not diffs and outcome.status == run.status, differences=diffs,
                         unused_exchanges=len(lib.remaining()), reason=outcome.reason)


def stored_traffic_log(store: Store, run_id: int) -> str:
    """The traffic log file a run recorded it streamed to (its last ``traffic_log`` event, or
    ``transcript`` for runs stored before 0.2); InputError naming --traffic-log when none."""
    from labrun.trafficlog import EVENT_KINDS

    original_run(store, run_id)
    events = [e for e in store.events(run_id, list(EVENT_KINDS)) if (e.data or {}).get("path")]
    if not events:
        raise InputError(f"run {run_id} recorded no traffic log: give --traffic-log FILE",
                         field="--traffic-log")
    path = str(events[-1].data["path"])
    if not Path(path).is_file():
        raise InputError(f"run {run_id}'s traffic log is gone", file=path,
                         field="--traffic-log")
    return path


def _load_log(path: str | Path) -> Any:
    """A traffic log file (InputError naming --traffic-log when unreadable or not one)."""
    import json

    from labrun.trafficlog import TrafficLog
    from labrun.visareplay import BLOCK_TOKEN, VALUES_TOKEN

    try:
        log = TrafficLog.load(path)
    except OSError as exc:
        raise InputError(f"cannot read the traffic log: {exc.strerror or exc}", file=str(path),
                         field="--traffic-log") from None
    except (json.JSONDecodeError, TypeError) as exc:
        raise InputError(f"not a traffic log (JSON lines of exchanges): {exc}", file=str(path),
                         field="--traffic-log") from None
    for number, entry in enumerate(log.entries, start=1):
        if entry.error is None and entry.data is None and entry.reply is not None \
                and (BLOCK_TOKEN.search(entry.reply) or VALUES_TOKEN.fullmatch(entry.reply)):
            raise InputError(f"line {number} holds a trace block without its bytes (logs written "
                             "before 0.2 keep only the size): it cannot be played back",
                             file=str(path), field="--traffic-log")
    return log


def _current_point(store: Store, replay_id: int, plan: Any) -> str:
    """The point a replay was at: the first of the plan it had not stored."""
    done = store.completed_keys(replay_id)
    for spec in plan.points():
        if spec.key not in done:
            return f"{spec.key} (#{spec.index})"
    return "after the last point"


# ------------------------------------------------------------------------------------------------
# replay against a model
# ------------------------------------------------------------------------------------------------
# Gamma fits a twin takes, preferred first (then any other fit whose name starts with gamma);
# the order the spool's headline reads gamma in (exact model first).


@dataclass
class ModelSpool:
    """The spool a model replay simulates, and where its numbers came from."""

    spec: Any  # labrun.vlab.scenario.SpoolSpec
    source: str
    rel_u_gamma: float = 0.0  # relative standard uncertainty of gamma (a fit's), for u_c
    why: str = ""  # why this fit (the headline rule of labrun spools), for a twin
    warnings: list[str] = field(default_factory=list)  # e.g. a twin from a fit without U


@dataclass
class ModelReplay:
    """Outcome of a replay against a model; ``to_dict`` is the ``--json`` output."""

    run_id: int
    replay_of: int
    status: str
    model: str
    spool: dict[str, Any]
    points_compared: int
    residual_db: dict[str, dict[str, Any]]
    residual_by_order: dict[str, dict[str, Any]]
    verdict: str
    patterns: list[str]
    reason: str
    per_point: list[dict[str, Any]] = field(default_factory=list)
    virtual: bool = True
    model_why: str = ""
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: run_id, replay_of, residual_db (per line: rms, max, ...), verdict, ..."""
        return dataclasses.asdict(self)


def twin_spool(store: Store, run: Any) -> ModelSpool:
    """The spool's headline fit (``compare.headline_fit``, the fit ``labrun spools`` shows; the
    run's own one-spool fit when no fit is stored yet) as a model spool: gamma, dispersion and
    slope from the fit, length and loss from the record; warned when its gamma claims no U."""
    from labrun.compare import GAMMA, headline_fit, headline_why
    from labrun.spoolfits import fit_history, fit_runs
    from labrun.store.models import Spool
    from labrun.vlab.scenario import SpoolSpec

    with store.session() as s:
        spool = s.get(Spool, run.spool_id) if run.spool_id is not None else None
        label = spool.label if spool is not None else None
    if label is None:
        raise InputError(f"run {run.id} is not linked to a spool: use --scenario FILE --spool "
                         "NAME", field="--twin")
    history = fit_history(store, label)
    record, newer = headline_fit(history or [fit_runs(store, [run.id], save=False)])
    where = (f"fit {record.fit_id} of {label}" if record.fit_id is not None
             else f"one-spool fit of run {run.id} (no stored fit of {label})")
    claims_u, why = headline_why(record)
    why = f"{where}: {why}" + "".join(f"; newer fit {n['fit_id']} not used ({n['why']})"
                                      for n in newer)
    params = record.parameters
    named = [n for n in GAMMA if n in params] + sorted(
        n for n in params if n.startswith("gamma") and n not in GAMMA)
    gamma = next((params[n] for n in named if params[n].value is not None), None)
    if gamma is None:
        raise InputError(f"the {where} has no gamma: run 'labrun fit' on a power sweep of "
                         f"{label} first", field="--twin")
    warnings = [] if claims_u else [
        f"the twin's spool values are not trustworthy: no fit of {label} claims a U for "
        f"gamma, the {where} is used (gamma {gamma.value:.4g} {gamma.unit}"
        + (f"; {gamma.extra['no_u_reason']}" if gamma.extra.get("no_u_reason") else "") + ")"
        + (f"; {gamma.extra['no_u_hint']}" if gamma.extra.get("no_u_hint") else "")]
    snap = record.spool_snapshot or {}
    length, loss = snap.get("length_km"), snap.get("loss_db_per_km")
    if length is None or loss is None:
        raise InputError(f"spool {label} has no length or loss on record", field="--twin")

    def value(name: str) -> float:
        p = params.get(name)
        return float(p.value) if p is not None and p.value is not None else 0.0

    fitted = "dispersion" in params and params["dispersion"].value is not None
    recorded = gamma.extra.get("dispersion_used_ps_per_nm_km")  # the spool record's D, if used
    d_model, s_model = ((value("dispersion"), value("dispersion_slope"))
                        if fitted or recorded is None else
                        (float(recorded), float(gamma.extra.get("slope_used_ps_per_nm2_km")
                                                or 0.0)))
    spec = SpoolSpec(name=label, length_km=length, loss_db_per_km=loss,
                     gamma_per_w_per_km=gamma.value, dispersion_ps_per_nm_km=d_model,
                     dispersion_slope_ps_per_nm2_km=s_model,
                     reference_wavelength_nm=float(gamma.extra.get(
                         "dispersion_reference_wavelength_nm") or 1550.0))
    rel = (gamma.stderr / gamma.value) if gamma.stderr and gamma.value else 0.0
    missing = ("" if fitted else "; dispersion from the spool record" if recorded is not None
               else "; dispersion not fitted, 0 assumed")
    return ModelSpool(spec, f"twin: {where}, {gamma.model.split(':')[0]}{missing}", rel,
                      why=why, warnings=warnings)


def scenario_spool(path: str, name: str) -> tuple[ModelSpool, Any]:
    """A spool of a scenario file (InputError naming --spool when it has none of that name)."""
    from labrun.vlab.scenario import load_scenario

    scenario = load_scenario(path)
    try:
        spec = scenario.spool(name)
    except KeyError:
        names = ", ".join(s.name for s in scenario.spools)
        raise InputError(f"no spool {name!r} in the scenario (it has {names})",
                         file=str(scenario.source), field="--spool") from None
    return ModelSpool(spec, f"scenario {scenario.source}, spool {name}"), scenario


def lab_scenario(bench: Bench, spool: ModelSpool, base: Any = None) -> dict[str, Any]:
    """A virtual-lab scenario of the run's bench (roles, calibration, caps) around one spool;
    OSA, realism of ``base`` (a scenario) when given, else realism off; never faults."""
    cal = bench.calibration
    caps = {r: s.max_power_dbm for r, s in bench.instruments.items()
            if s.max_power_dbm is not None}
    instruments: dict[str, Any] = {}
    for role in ROLE_KINDS:
        spec: dict[str, Any] = {"present": role in bench.instruments}
        if base is not None:
            spec = {**getattr(base.instruments, role).model_dump(exclude_none=True), **spec}
            spec.pop("idn", None)
            spec["port"] = 0
        instruments[role] = spec
    return {
        "name": f"replay of a stored run on {spool.spec.name}",
        "connected": spool.spec.name,
        "spools": [spool.spec.model_dump()],
        "bench": {"name": f"virtual replay of {bench.name}",
                  "max_total_launched_dbm": bench.max_total_launched_dbm,
                  "path_loss_a_db": cal.path_loss_a_db, "path_loss_b_db": cal.path_loss_b_db,
                  "amplifier_loss_db": cal.amplifier_loss_db,
                  "output_to_osa_db": cal.output_to_osa_db, "input_tap_db": cal.input_tap_db,
                  "caps": caps},
        "instruments": instruments,
        "realism": base.realism.model_dump() if base is not None else {"enabled": False},
        "faults": {"enabled": False},
    }


def lab_bench(bench: Bench, lab: Any) -> Any:
    """The run's bench pointed at the virtual lab: same roles, profiles, caps and calibration,
    each resource the lab's, backend pyvisa-py, settle times scaled like the lab's time."""
    from labrun.bench import parse_bench

    q = json.dumps
    lines = ["# The bench of a replayed run, pointed at a virtual lab (no light is emitted).",
             "[bench]", f"name = {q(bench.name)}",
             f"max_total_launched_dbm = {bench.max_total_launched_dbm!r}",
             f"settle_scale = {lab.time_scale!r}", "", "[calibration]"]
    lines += [f"{k} = {v!r}" for k, v in bench.calibration.model_dump().items()]
    for role, spec in bench.instruments.items():
        lines += ["", f"[instruments.{role}]", f"resource = {q(lab.resources[role])}",
                  'backend = "@py"', f"profile = {q(str(spec.profile.path or spec.profile.name))}"]
        if spec.max_power_dbm is not None:
            lines.append(f"max_power_dbm = {spec.max_power_dbm!r}")
    return parse_bench("\n".join(lines) + "\n", Path("<virtual lab replay bench>"))


def point_times(store: Store, run_id: int) -> pd.DataFrame:
    """key and finished_at of every stored point of a run."""
    with store.session() as s:
        rows = s.execute(select(Point.key, Point.finished_at)
                         .where(Point.run_id == run_id)).all()
    return pd.DataFrame(rows, columns=["key", "finished_at"])


def replay_model(store: Store, run_id: int, *, spool: ModelSpool, base_scenario: Any = None,
                 time_scale: float = 0.0, seed: int = 0, progress: bool = False,
                 traffic_log: Any = None) -> ModelReplay:
    """Measure the run's stored plan again on a virtual lab of its bench and ``spool``, store it
    as a new run linked to the original, and compare the lines (measured minus replayed)."""
    from labrun import residuals as rs
    from labrun.engine import run_virtual
    from labrun.queries import run_points
    from labrun.vlab.lab import VirtualLab

    run = original_run(store, run_id)
    plan = stored_plan(run)
    bench = stored_bench(run)
    scenario = lab_scenario(bench, spool, base_scenario)
    with VirtualLab(scenario, time_scale=time_scale, seed=seed) as lab:
        outcome = run_virtual(plan, lab_bench(bench, lab), store, replay_of=run_id,
                              mode=spool.source, progress=progress, traffic_log=traffic_log)
    measured = run_points(store, run_id)
    reference = measured[measured["is_reference"]] if not measured.empty else measured
    measured = measured.merge(point_times(store, run_id), on="key")
    replayed = run_points(store, outcome.run_id)
    res = rs.residuals(measured, replayed) if not replayed.empty else pd.DataFrame()
    lines = rs.summarise(res, reference, rel_u_gamma=spool.rel_u_gamma) if not res.empty else {}
    judged = rs.verdict(lines) if lines else rs.Verdict("inconsistent", ["no points"],
                                                       "no point of the replay to compare")
    keys = rs.line_keys(res) if not res.empty else []
    per_point = [{"key": row["key"], **{k: _num(row[k]) for k in keys}}
                 for _, row in res.iterrows()] if keys else []
    return ModelReplay(
        run_id=outcome.run_id, replay_of=run_id, status=outcome.status, model=spool.source,
        spool=spool.spec.model_dump(), points_compared=len(res),
        residual_db={k: ln.to_dict() for k, ln in lines.items()},
        residual_by_order=rs.by_order(res) if not res.empty else {},
        verdict=judged.verdict, patterns=judged.patterns, reason=judged.reason,
        per_point=per_point, model_why=spool.why, warnings=list(spool.warnings))


def _num(v: Any) -> float | None:
    """A finite float rounded to 1e-4 dB, else None."""
    import math

    return round(float(v), 4) if v is not None and math.isfinite(float(v)) else None
