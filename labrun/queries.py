"""Read-side questions asked of the run store: a run's points as a table, a stored trace, runs.

Sits above the store and below the CLI; returns plain pandas/numpy objects usable in a notebook.
Tables are built by SQL and pandas (one query per table, a pivot for the line columns), never a
Python loop over rows.
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any, cast

from sqlalchemy import Text, and_, case, func, or_, select, type_coerce

from labrun.commit import TAP_KEY
from labrun.errors import InputError
from labrun.lines import Kind, LineId, Side
from labrun.store import Line, Point, Store, Trace
from labrun.store.models import Event, Run, Spool

if TYPE_CHECKING:  # numpy and pandas are imported where used: `labrun runs` starts without them
    import numpy as np
    import pandas as pd

POINT_COLUMNS = ("point_id", "index", "key", "is_reference", "repeat", "floor_dbm")
# run_points columns from the input-tap power meter's reading (commit.TAP_KEY in ``applied``)
TAP_COLUMNS = {"tap_power_meter_dbm": "power_meter_dbm",
               "tap_launched_total_dbm": "launched_total_dbm"}
MEASURED_SPACING = "measured_spacing_ghz"  # the reduction's tone spacing (Point.spacing_ghz)


def _frame(store: Store, query: Any) -> pd.DataFrame:
    """A query's rows as a DataFrame (values as SQLAlchemy's result processing gives them)."""
    import pandas as pd

    with store.engine.connect() as conn:
        result = conn.execute(query)
        columns = list(result.keys())
        return pd.DataFrame(list(map(tuple, result.fetchall())), columns=columns)


def _raw_frame(store: Store, query: Any) -> pd.DataFrame:
    """A big query's rows as a DataFrame straight from the driver's cursor (plain tuples, no
    SQLAlchemy row objects): values as the driver gives them. Literal values only (ids, line
    names), so the statement is compiled with them inline."""
    import pandas as pd

    sql = str(query.compile(store.engine, compile_kwargs={"literal_binds": True}))
    columns = [c.name for c in query.selected_columns]
    with store.engine.connect() as conn:
        dbapi = conn.connection.dbapi_connection
        if dbapi is None:  # only after the connection was invalidated
            raise RuntimeError("database connection lost before the query")
        cursor = dbapi.cursor()
        try:
            cursor.execute(sql)
            rows = cursor.fetchall()
        finally:
            cursor.close()
    return pd.DataFrame(rows, columns=columns)


def require_run(store: Store, run_id: int) -> None:
    """InputError naming RUN_ID when the run does not exist."""
    with store.engine.connect() as conn:
        if conn.execute(select(Run.id).where(Run.id == run_id)).first() is None:
            raise InputError(f"no run {run_id} in this database", field="RUN_ID")


_OUTPUT = or_(Trace.kind.is_(None), Trace.kind == "output")  # spool output (not the input tap)


def output_lines(store: Store, run_id: int) -> pd.DataFrame:
    """Every line of a run's spool-output traces: point_id, kind, side, order, powers, flags.

    Input-tap traces (switch path 2, kind "input") have lines of their own and are left out.
    """
    return _frame(store, select(
        Line.point_id, Line.kind, Line.side, Line.order, Line.freq_thz, Line.wavelength_nm,
        Line.power_dbm, Line.floor_dbm, Line.snr_db, Line.detected, Line.upper_limit_dbm)
        .join(Point, Point.id == Line.point_id)
        .outerjoin(Trace, Trace.id == Line.trace_id)
        .where(Point.run_id == run_id, _OUTPUT)
        .order_by(Line.id))


def line_keys(lines: pd.DataFrame) -> pd.Series:
    """The flat column name of each line row (LineId.key, computed once per distinct line)."""
    import pandas as pd

    if lines.empty:
        return pd.Series([], dtype=object, index=lines.index)
    triples = list(zip(lines["kind"], lines["side"], lines["order"], strict=True))
    names = {t: LineId(t[0], t[1], int(t[2])).key for t in set(triples)}
    return pd.Series([names[t] for t in triples], index=lines.index, dtype=object)


def _has_input_traces(store: Store, run_id: int) -> bool:
    """True when some point of the run captured the spool input (switch path 2) as well."""
    q = (select(Trace.id).join(Point, Point.id == Trace.point_id)
         .where(Point.run_id == run_id, Trace.kind != "output").limit(1))
    with store.engine.connect() as conn:
        return conn.execute(q).first() is not None


def _line_ids(store: Store, run_id: int, inputs: bool) -> list[LineId]:
    """The distinct output lines a run has (a handful: tones and sidebands per order);
    ``inputs``: the run has input-tap traces, whose lines are left out."""
    q = (select(Line.kind, Line.side, Line.order).distinct()
         .where(Line.point_id.in_(select(Point.id).where(Point.run_id == run_id))))
    if inputs:
        q = q.outerjoin(Trace, Trace.id == Line.trace_id).where(_OUTPUT)
    with store.engine.connect() as conn:
        # the columns hold only what LineId wrote (labrun.store.models.Line)
        found = [LineId(cast(Kind, k), cast(Side, s), int(o)) for k, s, o in conn.execute(q)]
    return sorted(found, key=lambda ln: (ln.kind != "tone", ln.side, ln.order))


def _json_column(values: pd.Series) -> list[dict]:
    """Decode a JSON column fetched as text in one parse (PostgreSQL drivers give dicts)."""
    if values.empty or not isinstance(values.iloc[0], str):
        return [v or {} for v in values]
    return [d or {} for d in json.loads("[" + ",".join(values.fillna("null")) + "]")]


def run_points(store: Store, run_id: int, *, include_reference: bool = True,
               limits: bool = False, measured_spacing: bool = False) -> pd.DataFrame:
    """One row per stored point of a run: setpoint columns plus a dBm column per detected line.

    Undetected lines are NaN; with ``limits`` their upper limits (dBm, from the reduction's
    floor) come as ``limit_<line>`` columns, NaN where the line was detected. Reference points are
    flagged in ``is_reference`` so callers can keep them out of fits. With
    ``measured_spacing`` the tone spacing the reduction measured on the OSA trace comes as
    ``measured_spacing_ghz`` (``spacing_ghz`` stays the setpoint's). Lines of input-tap traces
    (switch path 2) are left out: the columns are the spool output. One SQL query pivots the
    lines into columns (conditional aggregation per distinct line).
    """
    import pandas as pd

    require_run(store, run_id)
    inputs = _has_input_traces(store, run_id)  # most runs have none: no join with traces then
    keep = (Line.detected.is_(True), _OUTPUT) if inputs else (Line.detected.is_(True),)
    wanted = [func.max(case((and_(Line.kind == ln.kind, Line.side == ln.side,
                                  Line.order == ln.order, *keep), Line.power_dbm))).label(ln.key)
              for ln in _line_ids(store, run_id, inputs)]
    if limits:
        off = (Line.detected.is_(False), _OUTPUT) if inputs else (Line.detected.is_(False),)
        wanted += [func.max(case((and_(Line.kind == ln.kind, Line.side == ln.side,
                                       Line.order == ln.order, *off), Line.upper_limit_dbm))
                            ).label(f"limit_{ln.key}")
                   for ln in _line_ids(store, run_id, inputs)]
    if measured_spacing:
        wanted.append(func.max(Point.spacing_ghz).label(MEASURED_SPACING))
    q = (select(Point.id.label("point_id"), Point.index, Point.key, Point.is_reference,
                Point.repeat, Point.floor_dbm, type_coerce(Point.setpoint, Text).label("sp"),
                type_coerce(Point.applied, Text).label("ap"), *wanted)
         .select_from(Point)
         .outerjoin(Line, Line.point_id == Point.id))
    if inputs:
        q = q.outerjoin(Trace, Trace.id == Line.trace_id)
    q = q.where(Point.run_id == run_id).group_by(Point.id).order_by(Point.index)
    table = _raw_frame(store, q)
    if table.empty:
        return pd.DataFrame(columns=list(POINT_COLUMNS))
    measured = table.pop(MEASURED_SPACING).astype(float) if measured_spacing else None
    setpoints = pd.DataFrame(_json_column(table.pop("sp")), index=table.index)
    setpoints = setpoints.drop(columns=[c for c in setpoints.columns if c in table.columns])
    applied = pd.DataFrame(_json_column(table.pop("ap")), index=table.index)
    if TAP_KEY in applied:  # the input-tap power meter's reading (runs that read it)
        taps = pd.DataFrame([t if isinstance(t, dict) else {} for t in applied[TAP_KEY]])
        taps = taps.reindex(columns=list(TAP_COLUMNS.values())).astype(float)
        setpoints[list(TAP_COLUMNS)] = taps.to_numpy()
    lines = table.columns[len(POINT_COLUMNS):]
    table = pd.concat([table[list(POINT_COLUMNS)], setpoints,
                       table[lines].astype(float)], axis=1)
    table["is_reference"] = table["is_reference"].astype(bool)
    table["floor_dbm"] = table["floor_dbm"].astype(float)
    if measured is not None:
        table[MEASURED_SPACING] = measured
    if not include_reference:
        table = table[~table["is_reference"]].reset_index(drop=True)
    return table


def point_trace(store: Store, point_id: int, kind: str = "output") -> tuple[np.ndarray, np.ndarray,
                                                                            float | None]:
    """(x, y_dbm, rbw_nm) of a stored trace; x rebuilt from (start, stop, n) on a linear grid."""
    with store.session() as s:
        tr = s.execute(select(Trace).where(Trace.point_id == point_id, Trace.kind == kind)
                       ).scalars().first()
        if tr is None:
            raise InputError(f"point {point_id} has no {kind} trace", field="point")
        return tr.x(), tr.y(), tr.rbw_nm


def runs_table(store: Store, *, spool: str | None = None, since: Any = None,
               status: str | None = None) -> list[dict[str, Any]]:
    """Runs (newest first) with spool, plan, status, times and stored point counts, as dicts
    (no pandas: ``labrun runs`` starts fast)."""
    counts = (select(Point.run_id, func.count(Point.id).label("points_done"))
              .group_by(Point.run_id).subquery())
    q = (select(Run.id.label("run_id"), Spool.label.label("spool"), Run.plan_name, Run.status,
                Run.operator, Run.created_at, Run.started_at, Run.finished_at,
                Run.points_total, func.coalesce(counts.c.points_done, 0).label("points_done"),
                Run.reason)
         .outerjoin(Spool, Spool.id == Run.spool_id)
         .outerjoin(counts, counts.c.run_id == Run.id)
         .order_by(Run.id.desc()))
    if spool is not None:
        q = q.where(Spool.label == spool)
    if since is not None:
        q = q.where(Run.created_at >= since)
    if status is not None:
        q = q.where(Run.status == status)
    with store.engine.connect() as conn:
        return [dict(row._mapping) for row in conn.execute(q)]


def list_runs(store: Store, *, spool: str | None = None, since: Any = None,
              status: str | None = None) -> pd.DataFrame:
    """``runs_table`` as a DataFrame (for notebooks and reports)."""
    import pandas as pd

    rows = runs_table(store, spool=spool, since=since, status=status)
    return pd.DataFrame(rows, columns=["run_id", "spool", "plan_name", "status", "operator",
                                       "created_at", "started_at", "finished_at",
                                       "points_total", "points_done", "reason"])


def run_events(store: Store, run_id: int) -> pd.DataFrame:
    """A run's events in time order: at, kind, role, point key, message."""
    return _frame(store, select(Event.at, Event.kind, Event.role, Event.point_key, Event.message)
                  .where(Event.run_id == run_id).order_by(Event.id))
