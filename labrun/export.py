"""Export one stored run for other tools: CSV, Parquet (pyarrow), MATLAB (scipy.io), HDF5 (h5py).

Every format carries the same two tables (column names in ``COLUMNS_DOC``, also in README):

- points: one row per point: ``point_id``, ``index``, ``key``, ``is_reference``, ``repeat``,
  ``floor_dbm``, the setpoint columns (a list-valued setpoint such as ``pol_angles_deg`` becomes
  ``pol_angles_deg_1`` ...), and per line ``<line>_dbm`` (power, NaN when not detected),
  ``<line>_detected`` and ``<line>_upper_limit_dbm`` (for lines that did not clear the floor),
  where ``<line>`` is ``tone_low_0``, ``sideband_high_1``, ...;
- traces (spool output, one per point): ``x`` (nm) and ``y`` (dBm per RBW) of each point, as
  rows of a matrix padded with NaN (``trace_n`` holds each length) in MATLAB and HDF5, as list
  columns ``trace_x_nm`` / ``trace_y_dbm`` in Parquet, and in a second CSV file
  ``<out stem>.traces.csv`` (long form: point_id, x_nm, y_dbm) beside the points CSV.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import select

from labrun.errors import InputError
from labrun.store import Store

FORMATS = ("csv", "parquet", "mat", "hdf5")
COLUMNS_DOC = __doc__


def points_frame(store: Store, run_id: int) -> pd.DataFrame:
    """The run's points with setpoints, and power, detected flag and upper limit per line."""
    from labrun.queries import line_keys, output_lines, run_points

    table = run_points(store, run_id)
    if table.empty:
        return table
    base = table[[c for c in table.columns if not _is_line(c)]]
    flat = _flatten_lists(base)
    lines = output_lines(store, run_id)
    if lines.empty:
        return flat
    lines = lines.assign(key=line_keys(lines))
    per = lines.groupby(["point_id", "key"], sort=False).first()
    wide = []
    for field, suffix in (("power_dbm", "_dbm"), ("detected", "_detected"),
                          ("upper_limit_dbm", "_upper_limit_dbm")):
        col = per[field].unstack("key")
        if field == "power_dbm":
            col = col.astype(float).where(per["detected"].unstack("key").fillna(False)
                                          .astype(bool))
        elif field == "detected":
            col = col.fillna(False).astype(bool)
        else:
            col = col.astype(float)
        wide.append(col.add_suffix(suffix))
    lines_wide = pd.concat(wide, axis=1)
    lines_wide = lines_wide[sorted(lines_wide.columns, key=_line_order)]
    return flat.join(lines_wide, on="point_id")


def _is_line(column: str) -> bool:
    return column.startswith(("tone_", "sideband_"))


def _line_order(column: str) -> tuple:
    """tone before sideband, low before high, by order, then _dbm, _detected, _upper_limit."""
    parts = column.split("_")
    kind, side, order = parts[0], parts[1], int(parts[2])
    suffix = "_".join(parts[3:])
    return (kind != "tone", side, order, ("dbm", "detected", "upper_limit_dbm").index(suffix))


def _flatten_lists(frame: pd.DataFrame) -> pd.DataFrame:
    """List-valued columns become one numbered column per element (pol_angles_deg_1, ...)."""
    out = frame.copy()
    for col in frame.columns:
        first = frame[col].dropna()
        if not first.empty and isinstance(first.iloc[0], list | tuple):
            parts = pd.DataFrame(frame[col].tolist(), index=frame.index)
            parts.columns = [f"{col}_{i + 1}" for i in range(parts.shape[1])]
            pos = out.columns.get_loc(col)
            out = pd.concat([out.iloc[:, :pos], parts, out.iloc[:, pos + 1:]], axis=1)
    return out


def traces(store: Store, run_id: int) -> tuple[np.ndarray, list[np.ndarray], list[np.ndarray]]:
    """(point ids, x arrays, y arrays) of the run's spool-output traces, in point order."""
    from labrun.store.models import Point, Trace

    with store.session() as s:
        rows = s.execute(select(Point.id, Trace).join(Trace, Trace.point_id == Point.id)
                         .where(Point.run_id == run_id, Trace.kind == "output")
                         .order_by(Point.index)).all()
        ids = np.array([pid for pid, _ in rows], dtype=np.int64)
        return ids, [t.x() for _, t in rows], [t.y() for _, t in rows]


def _padded(arrays: list[np.ndarray]) -> np.ndarray:
    """Arrays as rows of one matrix, NaN-padded to the longest."""
    width = max((a.size for a in arrays), default=0)
    out = np.full((len(arrays), width), np.nan)
    for i, a in enumerate(arrays):
        out[i, :a.size] = a
    return out


def export_run(store: Store, run_id: int, fmt: str, out: str | Path) -> list[Path]:
    """Write the run in ``fmt`` to ``out``; returns the files written."""
    if fmt not in FORMATS:
        raise InputError(f"unknown format {fmt!r} (one of {', '.join(FORMATS)})",
                         field="--format")
    out = Path(out)
    if not out.parent.is_dir():
        raise InputError(f"folder {out.parent} does not exist", file=str(out), field="--out")
    points = points_frame(store, run_id)
    ids, xs, ys = traces(store, run_id)
    writer = {"csv": _csv, "parquet": _parquet, "mat": _mat, "hdf5": _hdf5}[fmt]
    try:
        return writer(out, points, ids, xs, ys)
    except OSError as exc:
        raise InputError(f"cannot write: {exc.strerror or exc}", file=str(out),
                         field="--out") from None


def _csv(out: Path, points: pd.DataFrame, ids: np.ndarray, xs: list, ys: list) -> list[Path]:
    points.to_csv(out, index=False)
    side = out.with_name(out.stem + ".traces.csv")
    sizes = [x.size for x in xs]
    pd.DataFrame({"point_id": np.repeat(ids, sizes),
                  "x_nm": np.concatenate(xs) if xs else np.array([]),
                  "y_dbm": np.concatenate(ys) if ys else np.array([])}).to_csv(side, index=False)
    return [out, side]


def _need(module: str) -> Any:
    import importlib

    try:
        return importlib.import_module(module)
    except ModuleNotFoundError:
        raise InputError(f"this format needs {module.split('.')[0]} (pip install "
                         f"'labrun[export]')", field="--format") from None


def _parquet(out: Path, points: pd.DataFrame, ids: np.ndarray, xs: list,
             ys: list) -> list[Path]:
    pa = _need("pyarrow")
    pq = _need("pyarrow.parquet")
    by_id = dict(zip(ids.tolist(), range(len(ids)), strict=True))
    rows = [by_id.get(int(p)) for p in points["point_id"]] if not points.empty else []
    table = pa.Table.from_pandas(points, preserve_index=False)
    table = table.append_column("trace_x_nm", pa.array(
        [None if r is None else xs[r] for r in rows], type=pa.list_(pa.float64())))
    table = table.append_column("trace_y_dbm", pa.array(
        [None if r is None else ys[r] for r in rows], type=pa.list_(pa.float64())))
    pq.write_table(table, out)
    return [out]


def _columns(points: pd.DataFrame) -> dict[str, np.ndarray]:
    """Points as plain numeric/bool/string arrays (MATLAB and HDF5 want no object columns)."""
    cols = {}
    for name in points.columns:
        values = points[name]
        if values.dtype == bool:
            cols[name] = values.to_numpy(dtype=bool)
        elif pd.api.types.is_numeric_dtype(values):
            cols[name] = values.to_numpy(dtype=float)
        else:
            cols[name] = values.astype(str).to_numpy(dtype=object)
    return cols


def _mat(out: Path, points: pd.DataFrame, ids: np.ndarray, xs: list, ys: list) -> list[Path]:
    from scipy.io import savemat

    cols = _columns(points)
    savemat(out, {"points": {k: (v.astype(str) if v.dtype == object else v)
                             for k, v in cols.items()},
                  "trace_point_id": ids.astype(float), "trace_x_nm": _padded(xs),
                  "trace_y_dbm": _padded(ys),
                  "trace_n": np.array([x.size for x in xs], dtype=float)},
            do_compression=True, oned_as="column")
    return [out]


def _hdf5(out: Path, points: pd.DataFrame, ids: np.ndarray, xs: list, ys: list) -> list[Path]:
    h5py = _need("h5py")
    with h5py.File(out, "w") as f:
        grp = f.create_group("points")
        for name, values in _columns(points).items():
            if values.dtype == object:
                grp.create_dataset(name, data=values.astype(str).astype(object),
                                   dtype=h5py.string_dtype())
            else:
                grp.create_dataset(name, data=values)
        tr = f.create_group("traces")
        tr.create_dataset("point_id", data=ids)
        tr.create_dataset("x_nm", data=_padded(xs), compression="gzip")
        tr.create_dataset("y_dbm", data=_padded(ys), compression="gzip")
        tr.create_dataset("n", data=np.array([x.size for x in xs], dtype=np.int64))
    return [out]
