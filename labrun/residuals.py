"""Residuals of a run against its replay on a model, their combined uncertainty, and a verdict.

Pure: tables in, numbers out. A residual is measured minus replayed (dB) per point and line.
Each line's residuals are summarised (n, mean, rms, max, trends against time, power and spacing)
and compared with the combined standard uncertainty of the comparison (GUM 5.1.2, uncorrelated
inputs added in quadrature): the original's repeatability from its reference points (type A,
GUM 4.2), the launched-power calibration (type B) propagated with the line's power law, and the
model's parameter uncertainty. A line is consistent when its rms residual stays within the
expanded uncertainty k u_c (k = 2, GUM 6.3: about 95 % coverage). When the run is not
consistent with the model, the pattern names the likely cause: a trend with time (drift), a
uniform offset on the tones (launched-power calibration), sidebands beyond what the tones explain
that follow the spacing (dispersion) or not (gamma).
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd

LINE_KEY = re.compile(r"^(tone|sideband)_(low|high)_(\d+)$")
COVERAGE_K = 2.0  # GUM 6.3.3: k = 2 gives about 95 % for a normal distribution
# Standard uncertainty of a launched tone power from the bench's path-loss calibration, each
# tone independently (common practice: a calibration against a power meter holds ~0.1 dB).
CAL_U_DB = 0.1
# Repeatability of an OSA line power when the run has no repeated reference points to estimate
# it (common practice: a grating OSA repeats a strong line to a few hundredths of a dB).
READ_U_DB = 0.05
SIGNIFICANT_CORR = 0.7  # |correlation| above which a residual trend counts as the pattern
DB_PER_NEPER_POWER = 10.0 / math.log(10.0)  # d(10 log10 x) = 4.343 dx/x


@dataclass
class LineResidual:
    """Summary of one line's residuals (dB) and the uncertainty they are judged against."""

    key: str
    n: int
    mean: float
    rms: float
    max: float
    u_c: float
    consistent: bool
    per_hour: float | None = None  # trend against time, dB/h
    per_db: float | None = None  # trend against total launched power, dB/dB
    per_ghz: float | None = None  # trend against spacing, dB/GHz
    corr_time: float | None = None
    corr_power: float | None = None
    corr_spacing: float | None = None
    power_effect: float | None = None  # the power trend across the sweep's power range, dB
    spacing_effect: float | None = None  # the spacing trend across the spacing range, dB
    ref_span: float | None = None  # range of the residuals of the repeated reference points
    ref_corr_time: float | None = None  # their correlation with time

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready (rounded to 1e-4 dB; NaN as None)."""
        return {k: (round(v, 4) if isinstance(v, float) and math.isfinite(v) else
                    (None if isinstance(v, float) else v)) for k, v in asdict(self).items()}


@dataclass
class Verdict:
    """``consistent`` or ``inconsistent``, the patterns found and a one-line reason."""

    verdict: str
    patterns: list[str] = field(default_factory=list)
    reason: str = ""


def line_keys(table: pd.DataFrame) -> list[str]:
    """The line columns of a run_points table (tone_low_0, sideband_high_1, ...), in order."""
    return [c for c in table.columns if LINE_KEY.match(str(c))]


def order_of(key: str) -> int:
    """The order of a line key (0 for the tones)."""
    m = LINE_KEY.match(key)
    return int(m.group(3)) if m else 0


def calibration_u(key: str, cal_u_db: float = CAL_U_DB) -> float:
    """Launched-power calibration uncertainty carried into a line: order n on the low side
    grows as P_a^(n+1) P_b^n (and mirrored on the high side; tones as their own power), so
    independent tone errors u give u sqrt((n+1)^2 + n^2) (GUM 5.1.2, sensitivity coefficients
    from the small-signal FWM power law, docs/design.md "Physics")."""
    n = order_of(key)
    return cal_u_db * math.hypot(n + 1, n) if n else cal_u_db


def gamma_u(key: str, rel_u_gamma: float) -> float:
    """Model uncertainty of a line from gamma's relative standard uncertainty: order n sidebands
    scale as gamma^(2n) in the small-signal regime; tones do not depend on gamma."""
    return 2 * order_of(key) * DB_PER_NEPER_POWER * rel_u_gamma


def repeatability(reference: pd.DataFrame, key: str) -> float | None:
    """Type A standard uncertainty of one reading from the repeated reference points (sample
    standard deviation, GUM 4.2.2); None with fewer than two detected repeats."""
    if key not in reference:
        return None
    values = reference[key].to_numpy(dtype=float)
    values = values[np.isfinite(values)]
    return float(np.std(values, ddof=1)) if values.size >= 2 else None


def total_power_dbm(table: pd.DataFrame) -> np.ndarray | None:
    """Total launched power of each point (dBm) from power_a_dbm and power_b_dbm, or None."""
    if "power_a_dbm" not in table or "power_b_dbm" not in table:
        return None
    pa = table["power_a_dbm"].to_numpy(dtype=float)
    pb = table["power_b_dbm"].to_numpy(dtype=float)
    return 10.0 * np.log10(10.0 ** (pa / 10.0) + 10.0 ** (pb / 10.0))


def _product(a: float | None, b: float | None) -> float | None:
    """a * b, or None when either is missing (a slope times the span it acts over)."""
    return a * b if a is not None and b is not None else None


def _trend(x: np.ndarray | None, r: np.ndarray) -> tuple[float | None, float | None]:
    """(least-squares slope, correlation) of r against x; None when x does not vary."""
    if x is None or r.size < 3:
        return None, None
    ok = np.isfinite(x)
    x, r = x[ok], r[ok]
    if r.size < 3 or np.ptp(x) <= 0 or np.std(r) == 0:
        return (0.0 if r.size >= 3 and np.ptp(x) > 0 else None), None
    slope = float(np.polyfit(x, r, 1)[0])
    return slope, float(np.corrcoef(x, r)[0, 1])


def residuals(measured: pd.DataFrame, replayed: pd.DataFrame) -> pd.DataFrame:
    """Per point key (measured order), measured minus replayed for every line both detected;
    with the point's hours since the first point, total power and spacing as columns."""
    keys = [k for k in line_keys(measured) if k in replayed.columns]
    merged = measured.merge(replayed[["key", *keys]], on="key", suffixes=("", "__replay"))
    out = pd.DataFrame({"key": merged["key"]})
    for k in keys:
        out[k] = merged[k].to_numpy(dtype=float) - merged[f"{k}__replay"].to_numpy(dtype=float)
    if "finished_at" in merged:
        t = pd.to_datetime(merged["finished_at"], utc=True)
        out["hours"] = ((t - t.min()).dt.total_seconds() / 3600.0).to_numpy()
    power = total_power_dbm(merged)
    if power is not None:
        out["power_dbm"] = power
    if "spacing_ghz" in merged:
        out["spacing_ghz"] = merged["spacing_ghz"].to_numpy(dtype=float)
    if "is_reference" in merged:
        out["is_reference"] = merged["is_reference"].to_numpy(dtype=bool)
    return out


def summarise(res: pd.DataFrame, reference: pd.DataFrame, *, rel_u_gamma: float = 0.0,
              cal_u_db: float = CAL_U_DB) -> dict[str, LineResidual]:
    """Per line: the residual statistics and the combined uncertainty they are judged against."""
    out: dict[str, LineResidual] = {}
    cols = {name: res[name].to_numpy(dtype=float) if name in res else None
            for name in ("hours", "power_dbm", "spacing_ghz")}
    for key in line_keys(res):
        r = res[key].to_numpy(dtype=float)
        ok = np.isfinite(r)
        if not ok.any():
            continue
        rr = r[ok]
        u_rep = repeatability(reference, key)
        u_c = math.sqrt((READ_U_DB if u_rep is None else u_rep) ** 2
                        + calibration_u(key, cal_u_db) ** 2 + gamma_u(key, rel_u_gamma) ** 2)
        rms = float(np.sqrt(np.mean(rr ** 2)))
        trends = {name: _trend(None if x is None else x[ok], rr) for name, x in cols.items()}
        spans = {name: float(np.ptp(x[ok][np.isfinite(x[ok])])) if x is not None
                 and np.isfinite(x[ok]).any() else None for name, x in cols.items()}
        effects = {name: _product(trends[name][0], spans[name])
                   for name in ("power_dbm", "spacing_ghz")}
        ref_span = ref_corr = None
        if "is_reference" in res and cols["hours"] is not None:
            refs = ok & res["is_reference"].to_numpy(dtype=bool)
            if refs.sum() >= 3:  # the same setpoint again and again: only time changes
                ref_span = float(np.ptp(r[refs]))
                ref_corr = _trend(cols["hours"][refs], r[refs])[1]
        out[key] = LineResidual(
            key=key, n=int(rr.size), mean=float(np.mean(rr)), rms=rms,
            max=float(np.max(np.abs(rr))), u_c=u_c, consistent=rms <= COVERAGE_K * u_c,
            per_hour=trends["hours"][0], per_db=trends["power_dbm"][0],
            per_ghz=trends["spacing_ghz"][0], corr_time=trends["hours"][1],
            corr_power=trends["power_dbm"][1], corr_spacing=trends["spacing_ghz"][1],
            power_effect=effects["power_dbm"], spacing_effect=effects["spacing_ghz"],
            ref_span=ref_span, ref_corr_time=ref_corr)
    return out


def by_order(res: pd.DataFrame) -> dict[str, dict[str, Any]]:
    """Residuals pooled per order, both sides ("tones", "order 1", ...): n, rms, max (dB)."""
    out: dict[str, dict[str, Any]] = {}
    for n in sorted({order_of(k) for k in line_keys(res)}):
        values = np.concatenate([res[k].to_numpy(dtype=float) for k in line_keys(res)
                                 if order_of(k) == n])
        values = values[np.isfinite(values)]
        if values.size:
            out["tones" if n == 0 else f"order {n}"] = {
                "n": int(values.size), "rms": round(float(np.sqrt(np.mean(values ** 2))), 4),
                "max": round(float(np.max(np.abs(values))), 4)}
    return out


def _strong(corr: float | None) -> bool:
    return corr is not None and abs(corr) >= SIGNIFICANT_CORR


def _drifts(ln: LineResidual) -> bool:
    """A line whose residuals follow time: its repeated reference points (same setpoint) move
    beyond the uncertainty and with time; without them, a time trend that neither power nor
    spacing explains (in a sweep, time and the swept axis often run together)."""
    if ln.ref_span is not None:
        return ln.ref_span > COVERAGE_K * ln.u_c and _strong(ln.ref_corr_time)
    return (_strong(ln.corr_time) and not _strong(ln.corr_power)
            and not _strong(ln.corr_spacing))


def verdict(lines: dict[str, LineResidual]) -> Verdict:
    """Consistent when every line is; otherwise the patterns the inconsistent lines show."""
    bad = [ln for ln in lines.values() if not ln.consistent]
    if not bad:
        worst = max(lines.values(), key=lambda ln: ln.rms / ln.u_c, default=None)
        reason = ("every line within its expanded uncertainty" if worst is None else
                  f"every line within k u_c (k = {COVERAGE_K:g}); largest rms {worst.rms:.3f} dB "
                  f"on {worst.key} against u_c {worst.u_c:.3f} dB")
        return Verdict("consistent", [], reason)
    patterns: list[str] = []
    notes: list[str] = []
    tones = [ln for ln in lines.values() if order_of(ln.key) == 0]
    tone_mean = float(np.mean([ln.mean for ln in tones])) if tones else 0.0
    drifting = [ln for ln in bad if _drifts(ln)]
    if drifting:
        patterns.append("drift")
        ln = drifting[0]
        notes.append(f"{ln.key} trends with time ({ln.per_hour:+.3f} dB/h"
                     + (f", the reference points over {ln.ref_span:.2f} dB" if ln.ref_span
                        is not None else "") + "): drift")
    bad_tones = [ln for ln in bad if order_of(ln.key) == 0 and ln not in drifting]
    if bad_tones:
        patterns.append("launched-power calibration")
        notes.append(f"the tones are off by a uniform {tone_mean:+.2f} dB: launched-power "
                     "calibration (path losses)")
    for ln in sorted(bad, key=lambda ln: order_of(ln.key)):
        n = order_of(ln.key)
        if n == 0 or ln in drifting:
            continue
        # what a launched-power offset of the tones explains: order n moves (2n + 1) times it
        excess = ln.mean - (2 * n + 1) * tone_mean
        limit = COVERAGE_K * ln.u_c
        with_spacing = _strong(ln.corr_spacing) and abs(ln.spacing_effect or 0) > limit
        with_power = _strong(ln.corr_power) and abs(ln.power_effect or 0) > limit
        if abs(excess) <= limit and not (with_spacing or with_power):
            continue
        if with_spacing and abs(ln.corr_spacing or 0) >= abs(ln.corr_power or 0):
            name, why = "dispersion", f"grows with spacing ({ln.per_ghz:+.4f} dB/GHz)"
        else:
            name = "gamma"
            trend = f", {ln.per_db:+.3f} dB per dB of power" if ln.per_db is not None else ""
            why = f"sidebands off by {excess:+.2f} dB beyond the tones{trend}"
            if ln.corr_spacing is None:
                why += " (at one spacing, dispersion looks the same)"
        if name not in patterns:
            patterns.append(name)
            notes.append(f"{ln.key} {why}: {name}")
    if not patterns:
        patterns.append("unexplained")
        notes.append("residuals beyond the uncertainty without a clear pattern")
    return Verdict("inconsistent", patterns, "; ".join(notes))
