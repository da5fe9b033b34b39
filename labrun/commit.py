"""What the store keeps of a point: the row built from a measured point (setpoint, traces, lines,
applied settings) in JSON-safe values, and the progress bar's line. The engine commits the row
in one transaction on the writer thread (labrun/writer.py)."""

from __future__ import annotations

import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labrun.store.tracedata import TraceData

TAP_KEY = "tap"  # the input-tap power meter's reading in a point's ``applied`` JSON

if TYPE_CHECKING:
    from labrun.capture import Captured
    from labrun.plan import PointSpec
    from labrun.reduce import Reduction


def point_row(spec: PointSpec, traces: Sequence[Captured], red: Reduction, attempts: int,
              started: Any, *, applied: dict[tuple[str, str], Any], rbw_nm: float | None,
              trace_meta: dict[str, Any], input_meta: dict[str, Any],
              tap: dict[str, float] | None = None) -> dict[str, Any]:
    """Everything the store keeps of a point, taken now (the settings applied change with
    the next point while the writer thread stores this one). ``tap``: the input-tap power
    meter's reading of this point, kept under "tap" in the ``applied`` JSON."""
    lines = [line_dict(ml, trace=i) for i, tr in enumerate(traces)
             for ml in tr.reduction.lines]
    flat: dict[str, Any] = {f"{r}.{m}": v for (r, m), v in applied.items()}
    if tap is not None:
        flat[TAP_KEY] = tap
    return dict(
        key=spec.key, index=spec.index, setpoint=jsonable(spec.setpoint),
        repeat=spec.repeat, is_reference=spec.is_reference,
        traces=[TraceData(tr.x, tr.y, kind=tr.kind, rbw_nm=rbw_nm,
                          settings=trace_meta if tr.kind == "output" else input_meta)
                for tr in traces],
        lines=lines, applied=jsonable(flat),
        spacing_ghz=red.spacing_ghz, floor_dbm=red.floor_dbm, flags=list(red.flags),
        attempts=attempts, started_at=started,
    )


def line_dict(line: Any, trace: int = 0) -> dict[str, Any]:
    """A MeasuredLine as a plain dict for the store, linked to trace number ``trace``."""
    out = dict(line) if isinstance(line, dict) else dict(vars(line))
    out["trace"] = trace
    return out


def jsonable(obj: Any) -> Any:
    """Tuples to lists, numpy scalars to floats, NaN to None: safe for a JSON column."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [jsonable(v) for v in obj]
    if hasattr(obj, "item") and callable(obj.item):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def postfix(red: Reduction) -> str:
    """'tone a -1.2 dBm, low 1 -31.0 dBm' from a reduction, for the progress bar."""
    parts = []
    for ml in red.lines:
        if ml.side == "low" and ml.order <= 1:  # tone a and the first low sideband
            label = ml.line_id.label()
            if ml.detected and ml.power_dbm is not None and math.isfinite(ml.power_dbm):
                parts.append(f"{label} {ml.power_dbm:.1f} dBm")
            else:
                parts.append(f"{label} <{ml.upper_limit_dbm:.1f} dBm")
    return ", ".join(parts)


def progress_bar(total: int, done: int, enabled: bool) -> Any:
    """A tqdm bar on stderr with ETA, or None."""
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(total=total, initial=done, unit="pt", file=sys.stderr, mininterval=0.5,
                dynamic_ncols=True, leave=True)
