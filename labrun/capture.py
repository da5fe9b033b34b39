"""OSA capture and trace checks: one captured trace, the OSA settings of a point, and the checks
that refuse a short, ragged or corrupted trace or a reduction without both tones.

Every refusal here is an ``InstrumentError`` (role ``osa``): the engine retries it per its fault
policy (labrun/faults.py). Pure functions; the sweeping itself is the engine's ``Runner``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from labrun.errors import InstrumentError
from labrun.physics.units import nm_to_thz
from labrun.profiles import LEVEL_RANGE_DBM

# Sanity bounds of a trace sample in dBm: an OSA shows nothing outside them; a value outside is a
# corrupted transfer, not light (common practice).
TRACE_DBM_BOUNDS = LEVEL_RANGE_DBM  # no OSA shows levels beyond (labrun.profiles)
# The OSA's settings of a point, in the order of OsaSettings (centre, span, RBW, samples).
OSA_SETTINGS = ("set_center_nm", "set_span_nm", "set_rbw_nm", "set_points")


@dataclass
class Captured:
    """One trace of a point: kind ("output" or "input"), x (nm), y (dBm per RBW), reduction."""

    kind: str
    x: Any
    y: Any
    reduction: Any = None


def check_trace(x: Any, y: Any, want: int) -> None:
    """Refuse (InstrumentError, retried) a trace that is short, ragged or corrupted: ``want``
    samples, x never decreasing and rising from first to last (an integer axis in pm repeats
    values), every y finite and inside TRACE_DBM_BOUNDS."""
    import numpy as np

    problem = None
    if y.size != want or x.size != want:
        problem = f"short trace: {y.size} y and {x.size} x samples, configured {want}"
    elif not (np.all(np.isfinite(x)) and np.all(np.diff(x) >= 0)
              and (x.size == 1 or x[0] < x[-1])):
        problem = "corrupted trace: x is not finite and increasing"
    elif not (np.all(np.isfinite(y)) and TRACE_DBM_BOUNDS[0] <= float(y.min())
              and float(y.max()) <= TRACE_DBM_BOUNDS[1]):
        problem = "corrupted trace: y has non-finite or impossible dBm values"
    if problem:
        raise InstrumentError(problem, role="osa")


def expected_thz(setpoint: dict[str, Any]) -> tuple[float, float] | None:
    """Frequencies (THz) of tone a and tone b from the setpoint, to guide the reduction."""
    wl_a, spacing = setpoint.get("wavelength_a_nm"), setpoint.get("spacing_ghz")
    if wl_a is None or spacing is None:
        return None
    f_a = float(nm_to_thz(wl_a))
    return f_a, f_a + float(spacing) / 1000.0


def check_tones(trace: Captured) -> None:
    """Refuse (InstrumentError, retried) a reduction that did not find both tones: a trace
    without them is not a good point, whatever garbled or truncated it."""
    red = trace.reduction
    tones = [ml for ml in getattr(red, "lines", []) if ml.kind == "tone" and ml.detected]
    if len(tones) < 2 or getattr(red, "spacing_ghz", None) is None:
        raise InstrumentError(f"{trace.kind} trace: the reduction found {len(tones)} of the 2 "
                              "tones", role="osa")
