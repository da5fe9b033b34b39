"""Replay a stored run: its recorded traffic played back, or its plan measured on a model.

Both store a new run linked to the original (a ``replay`` event with ``replay_of``) and run the
same engine (settings, sweeps, reduction, checks, storage) as a night in the lab; no light is
emitted. ``replay_traffic`` serves the original's traffic log through ``visareplay`` and checks
that the replayed lines equal the original's bit for bit. ``replay_model`` (labrun.replay_model)
measures the plan on a virtual lab and compares.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import or_, select

from labrun.errors import InputError
from labrun.store import Line, Point, Store, Trace

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
    # No waits: the answers are recorded. The retry policy is the original's, so a recorded
    # fault is retried as it was.
    bench = stored_bench(run, settle_scale=0.0)
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
