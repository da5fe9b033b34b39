"""Read-side questions asked of the run store: a run's points as a table, a stored trace.

Sits above the store and below the CLI; returns plain pandas/numpy objects usable in a notebook.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from sqlalchemy import or_, select

from labrun.errors import InputError
from labrun.lines import LineId
from labrun.store import Line, Point, Store, Trace


def run_points(store: Store, run_id: int, *, include_reference: bool = True) -> pd.DataFrame:
    """One row per stored point of a run: setpoint columns plus a dBm column per detected line.

    Undetected lines are NaN (their upper limits stay in the lines table). Reference points are
    flagged in ``is_reference`` so callers can keep them out of fits. Lines of input-tap traces
    (switch path 2) are left out: the columns are the spool output.
    """
    if store.get_run(run_id) is None:
        raise InputError(f"no run {run_id} in this database", field="RUN_ID")
    with store.session() as s:
        points = s.execute(
            select(Point.id, Point.index, Point.key, Point.is_reference, Point.repeat,
                   Point.setpoint, Point.floor_dbm).where(Point.run_id == run_id)
            .order_by(Point.index)).all()
        # lines of the spool output only: input-tap traces (kind "input") have lines of their own
        lines = s.execute(
            select(Line.point_id, Line.kind, Line.side, Line.order, Line.power_dbm, Line.detected)
            .join(Point, Point.id == Line.point_id)
            .outerjoin(Trace, Trace.id == Line.trace_id)
            .where(Point.run_id == run_id, or_(Trace.kind.is_(None), Trace.kind == "output"))
        ).all()
    rows: dict[int, dict] = {}
    for p in points:
        row = {"point_id": p.id, "index": p.index, "key": p.key, "is_reference": p.is_reference,
               "repeat": p.repeat, "floor_dbm": p.floor_dbm}
        row.update(p.setpoint or {})
        rows[p.id] = row
    for ln in lines:
        value = ln.power_dbm if ln.detected and ln.power_dbm is not None else np.nan
        rows[ln.point_id][LineId(ln.kind, ln.side, ln.order).key] = value
    table = pd.DataFrame(list(rows.values()))
    if not include_reference and not table.empty:
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

