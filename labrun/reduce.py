"""Spectrum reduction: one OSA trace (x, y in dBm per RBW) -> tone and sideband powers.

docs/design.md §2.1 (line indexing) and §5.6 (reading an OSA trace). Pure numpy/scipy, no I/O.
Every step is vectorised over samples; the only Python loops run over the few lines of the grid.

Method, in order:
1. locate the two tones: the strongest peak near each expected position, or the two strongest
   peaks (scipy.signal.find_peaks on a block-maximum copy decimated to about RBW/2 per block);
2. refine each tone by a parabola through the three samples around its maximum, on dB (exact
   for a Gaussian RBW filter, whose log is a parabola), and measure the spacing;
3. place the grid ``f_a + k*delta`` for the orders asked and take the maximum of each line in a
   tolerance window around its grid position;
4. estimate the noise floor in each gap between grid positions, keeping 3 RBW away from lines,
   and interpolate it to each line (left and right gaps averaged in linear units: the
   interpolation idea of IEC 61280-2-9 for OSNR);
5. a line whose peak is less than ``threshold_db`` above its floor is not detected and carries an
   upper limit instead of a power. Detected powers have the floor subtracted in linear units.

The OSA convention: a line narrower than the RBW reads its total power at its peak (common
practice), so the "peak" power is the line power. The "integrate" method sums the trace over
the line and divides by the noise-equivalent bandwidth of the filter (Gaussian: 1.0645 x FWHM).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Literal

import numpy as np
from scipy.signal import find_peaks

from labrun.lines import LineId, grid_ks, line_id
from labrun.physics.units import C_M_PER_S

# Noise-equivalent bandwidth of a Gaussian filter over its FWHM: sqrt(pi / (4 ln 2)) = 1.0645
# (mathematical fact: integral of exp(-4 ln2 x^2) over the real line).
NEB_PER_FWHM_GAUSSIAN = float(np.sqrt(np.pi / (4.0 * np.log(2.0))))

XUnit = Literal["nm", "thz"]
PowerMethod = Literal["peak", "integrate"]

# Flag codes (stable strings: the store and JSON carry them).
FLAG_SATURATION = "saturation"
FLAG_CLOSE_LINES = "lines_closer_than_2rbw"
FLAG_MISSING_TONE = "missing_tone"
FLAG_SPAN = "span_too_narrow"

_LN10_10 = math.log(10.0) / 10.0
_C_NM_THZ = C_M_PER_S * 1e-3  # f[THz] * lambda[nm] = c * 1e-3
_PLATEAU_DB = 0.02  # samples within this of the maximum count as a flat (clipped) top
_GUARD_RBW = 3.0  # floor windows stay this many RBW away from any grid line (Gaussian: -108 dB)
_FIT_HALF_RBW = 0.6  # peak parabola over +-0.6 FWHM (the top 4.3 dB of a Gaussian line)


@dataclass(frozen=True)
class MeasuredLine:
    """One tone or sideband found in a trace (docs/design.md §2.1 indexing).

    ``power_dbm`` is None when the line is not detected; ``upper_limit_dbm`` is then the largest
    power the line can have. Lines outside the trace have every measured field None.
    """

    kind: str
    side: str
    order: int
    freq_thz: float
    wavelength_nm: float
    power_dbm: float | None
    floor_dbm: float | None
    snr_db: float | None
    detected: bool
    upper_limit_dbm: float | None = None
    saturated: bool = False

    @property
    def line_id(self) -> LineId:
        """The LineId of this line."""
        return LineId(self.kind, self.side, self.order)  # type: ignore[arg-type]

    @property
    def key(self) -> str:
        """Flat key such as 'tone_low_0' or 'sideband_high_2' (the column names fits use)."""
        return self.line_id.key

    def to_dict(self) -> dict:
        """JSON-ready dict; undetected lines have power_dbm null."""
        return asdict(self)


@dataclass
class Reduction:
    """Result of reduce_trace: spacing, overall floor, the lines in frequency order, flags.

    ``flags`` holds stable codes (saturation, lines_closer_than_2rbw, missing_tone,
    span_too_narrow); ``notes`` holds one human sentence per flag with the details.
    """

    spacing_ghz: float | None
    floor_dbm: float | None
    lines: list[MeasuredLine]
    flags: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    rbw_nm: float | None = None
    power_method: str = "peak"

    def line(self, kind: str, side: str, order: int) -> MeasuredLine | None:
        """The line with this kind, side and order, or None when not on the grid."""
        for ln in self.lines:
            if ln.kind == kind and ln.side == side and ln.order == order:
                return ln
        return None

    def powers_by_key(self) -> dict[str, float | None]:
        """{'tone_low_0': dBm or None, ...}: the flat columns fits.fit_run accepts."""
        return {ln.key: ln.power_dbm for ln in self.lines}

    def to_dict(self) -> dict:
        """The JSON of ``labrun analyze --json``."""
        return {
            "spacing_ghz": self.spacing_ghz,
            "floor_dbm": self.floor_dbm,
            "rbw_nm": self.rbw_nm,
            "power_method": self.power_method,
            "lines": [ln.to_dict() for ln in self.lines],
            "flags": list(self.flags),
            "notes": list(self.notes),
        }


def _lin(db: np.ndarray) -> np.ndarray:
    """dB -> linear (mW for dBm)."""
    return np.exp(np.asarray(db, dtype=float) * _LN10_10)


def _db(lin: np.ndarray) -> np.ndarray:
    """linear -> dB, -inf for non-positive values without warnings."""
    lin = np.asarray(lin, dtype=float)
    return np.where(lin > 0, 10.0 * np.log10(np.maximum(lin, 1e-300)), -np.inf)


def _opt(v: float) -> float | None:
    """float, or None for NaN/inf (JSON null)."""
    return v if math.isfinite(v) else None


def _clip(a: np.ndarray, lo, hi) -> np.ndarray:
    """np.clip without its per-call overhead (it dominates on the few-element arrays here)."""
    return np.minimum(np.maximum(a, lo), hi)


def _median(a: np.ndarray) -> float:
    """Median through one partition (np.median's wrapper costs more than the work here)."""
    n = a.size
    h = n // 2
    part = np.partition(a, (h - 1, h) if n % 2 == 0 and n > 1 else h)
    return float(part[h]) if n % 2 else float(0.5 * (part[h - 1] + part[h]))


class _Axis:
    """Maps between sample index, the trace's x unit and frequency (THz), x ascending."""

    def __init__(self, x: np.ndarray, unit: XUnit):
        self.x = x
        self.unit = unit
        self.n = x.size
        self.dx = (x[-1] - x[0]) / (self.n - 1)

    def f_to_x(self, f_thz: np.ndarray) -> np.ndarray:
        """Frequency (THz) -> x."""
        f = np.asarray(f_thz, dtype=float)
        return _C_NM_THZ / f if self.unit == "nm" else f

    def x_to_f(self, xv: np.ndarray) -> np.ndarray:
        """x -> frequency (THz)."""
        xv = np.asarray(xv, dtype=float)
        return _C_NM_THZ / xv if self.unit == "nm" else xv

    def x_to_index(self, xv: np.ndarray) -> np.ndarray:
        """x -> fractional sample index (linear between samples; extrapolated outside)."""
        xv = np.atleast_1d(np.asarray(xv, dtype=float))
        i = _clip(np.searchsorted(self.x, xv) - 1, 0, self.n - 2)
        x0 = self.x[i]
        return i + (xv - x0) / (self.x[i + 1] - x0)

    def index_to_x(self, idx: np.ndarray) -> np.ndarray:
        """Fractional sample index -> x."""
        idx = np.asarray(idx, dtype=float)
        i = _clip(np.floor(idx).astype(int), 0, self.n - 2)
        x0 = self.x[i]
        return x0 + (idx - i) * (self.x[i + 1] - x0)

    def f_to_index(self, f_thz: np.ndarray) -> np.ndarray:
        """Frequency -> fractional index."""
        return self.x_to_index(self.f_to_x(f_thz))

    def index_to_f(self, idx: np.ndarray) -> np.ndarray:
        """Fractional index -> frequency."""
        return self.x_to_f(self.index_to_x(idx))


@dataclass
class _Peaks:
    """Per-window maximum, parabolic vertex (fractional index and dB) and edge flag."""

    imax: np.ndarray
    vertex: np.ndarray
    peak_db: np.ndarray
    at_edge: np.ndarray
    plateau: np.ndarray


def _window_peaks(y: np.ndarray, centres: np.ndarray, half: int, fit_half: int) -> _Peaks:
    """Maximum of y in [c - half, c + half] for each centre, refined by a parabola on dB.

    A maximum on a window edge means the window holds no local peak (a slope of a neighbour).
    """
    n = y.size
    c = np.rint(centres).astype(int)
    offs = np.arange(-half, half + 1)
    idx = _clip(c[:, None] + offs[None, :], 0, n - 1)  # off the trace: edge samples repeat
    win = y[idx]
    j = np.argmax(win, axis=1)
    rows = np.arange(c.size)
    imax = idx[rows, j]
    ymax = win[rows, j]
    at_edge = (j == 0) | (j == 2 * half) | (imax <= 0) | (imax >= n - 1)
    plateau = np.sum(win >= (ymax - _PLATEAU_DB)[:, None], axis=1)
    vertex, peak, ok = _fit_parabola(y, imax, fit_half, None)
    vertex = np.where(at_edge | ~ok, imax, vertex)
    peak = np.where(at_edge | ~ok, ymax, peak)
    return _Peaks(imax, vertex, peak, at_edge, plateau)


def _fit_parabola(y: np.ndarray, imax: np.ndarray, k: int, floor_lin: np.ndarray | None,
                  max_side: int = 8):
    """Least-squares parabola on dB through samples imax-k..imax+k (floor removed if given).

    The log of a Gaussian RBW response is a parabola, so the fit is exact for a clean line and
    averages sample noise over the points used (at most 2 max_side + 1, evenly strided over the
    window, which keeps the cost flat for finely sampled traces). Returns vertex (fractional
    index), height (dB) and whether the fit is usable (a maximum; floor-free samples > 0).
    """
    n = y.size
    k = int(max(1, min(k, (n - 1) // 2)))
    stride = -(-k // max_side)
    kk = max(1, k // stride)
    reach = kk * stride
    c = np.minimum(np.maximum(imax, reach), n - 1 - reach)
    win = y[c[:, None] + (np.arange(-kk, kk + 1) * stride)[None, :]]
    ok = np.ones(c.size, dtype=bool)
    if floor_lin is not None:
        excess = _lin(win) - floor_lin[:, None]
        ok = np.all(excess > 0, axis=1)
        win = _db(np.where(excess > 0, excess, 1.0))
    a2, a1, a0 = _pinv_quadratic(kk) @ win.T  # rows: x^2, x, 1 coefficients per line
    ok &= a2 < 0
    a2s = np.where(ok, a2, -1.0)
    v = _clip(-a1 / (2.0 * a2s), -kk, kk)
    peak = a0 + a1 * v + a2s * v * v
    return c + v * stride, peak, ok


_PINV_CACHE: dict[int, np.ndarray] = {}


def _pinv_quadratic(k: int) -> np.ndarray:
    """Pseudo-inverse mapping 2k+1 equally spaced samples to (x^2, x, 1) coefficients."""
    if k not in _PINV_CACHE:
        t = np.arange(-k, k + 1, dtype=float)
        _PINV_CACHE[k] = np.linalg.pinv(np.stack([t * t, t, np.ones_like(t)], axis=1))
    return _PINV_CACHE[k]


def _gap_floors(y: np.ndarray, centres: np.ndarray, half: int) -> np.ndarray:
    """Mean power (dB, averaged in linear units) in [c - half, c + half]; NaN when off the trace."""
    n = y.size
    c = np.rint(centres).astype(int)
    idx = c[:, None] + np.arange(-half, half + 1)[None, :]
    valid = (idx >= 0) & (idx < n)
    lin = np.where(valid, _lin(y[_clip(idx, 0, n - 1)]), 0.0)
    count = valid.sum(axis=1)
    mean = lin.sum(axis=1) / np.maximum(count, 1)
    return np.where(count > 0, _db(mean), np.nan)


# Power samples a trace may hold (dBm per RBW): from far below any OSA's floor to 1 kW; beyond,
# the linear sums overflow (a 1e5 dBm sample gave a "detected" tone with no power).
SAMPLE_RANGE_DBM = (-300.0, 60.0)


def _validate(x, y, rbw: float, x_unit: str, orders: int, threshold_db: float, power_method: str):
    """Arrays as float, x ascending; ValueError with a plain sentence for anything unusable."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.ndim != 1 or y.shape != x.shape:
        raise ValueError("x and y must be 1-D arrays of the same length")
    if x.size < 8:
        raise ValueError("a trace needs at least 8 samples")
    if x_unit not in ("nm", "thz"):
        raise ValueError("x_unit must be 'nm' or 'thz'")
    if not (np.isfinite(rbw) and rbw > 0):
        raise ValueError("rbw must be a positive number in the unit of x")
    if orders < 0:
        raise ValueError("orders must be >= 0")
    if not 0 <= threshold_db <= 100:  # NaN fails too
        raise ValueError("threshold_db must be within 0-100 dB")
    if power_method not in ("peak", "integrate"):
        raise ValueError("power_method must be 'peak' or 'integrate'")
    if x[0] > x[-1]:
        x, y = x[::-1], y[::-1]
    if not (math.isfinite(float(np.add.reduce(x))) and math.isfinite(float(np.add.reduce(y)))):
        raise ValueError("x and y must be finite (no NaN or inf)")
    if x[0] <= 0 or x[-1] <= x[0]:
        raise ValueError("x must be positive and increasing or decreasing")
    if y.min() < SAMPLE_RANGE_DBM[0] or y.max() > SAMPLE_RANGE_DBM[1]:
        raise ValueError(f"power samples must lie within {SAMPLE_RANGE_DBM[0]:g} to "
                         f"{SAMPLE_RANGE_DBM[1]:g} dBm (1 kW); got {y.min():g} to {y.max():g}")
    return x, y


def _find_tones(y: np.ndarray, ax: _Axis, rbw_s: float, expected_thz, floor_guess: float,
                threshold_db: float) -> tuple[np.ndarray, np.ndarray]:
    """Approximate tone centres (fractional index, 2 values or fewer) and their tolerance."""
    if expected_thz is not None:
        fe = np.sort(np.asarray(expected_thz, dtype=float).ravel())
        if fe.size != 2 or not np.all(fe > 0):
            raise ValueError("expected_thz must hold two positive frequencies")
        ce = ax.f_to_index(fe)
        half = max(2, int(0.25 * abs(ce[1] - ce[0])))
        return ce, np.array([half, half])
    block = max(1, int(rbw_s / 2))
    m = y.size // block
    yb = y[: m * block].reshape(m, block).max(axis=1)
    peaks, _ = find_peaks(yb, height=floor_guess + threshold_db,
                          distance=max(1, int(round(0.8 * rbw_s / block))))
    if peaks.size == 0:
        return np.empty(0), np.empty(0, dtype=int)
    top = peaks[np.argsort(yb[peaks])[::-1][:2]]
    centres = np.sort(top) * block + (block - 1) / 2.0
    return centres, np.full(centres.size, block + 1)


def reduce_trace(
    x: np.ndarray,
    y_dbm: np.ndarray,
    rbw: float,
    *,
    x_unit: XUnit = "nm",
    orders: int = 3,
    expected_thz: tuple[float, float] | None = None,
    threshold_db: float = 3.0,
    power_method: PowerMethod = "peak",
) -> Reduction:
    """Reduce one OSA trace to both tones and ``orders`` sidebands per side.

    x in nm or THz (``x_unit``), y in dBm per RBW, ``rbw`` (filter FWHM) in the unit of x.
    ``expected_thz`` gives the two tone frequencies when known; otherwise the two strongest
    peaks are the tones. Raises ValueError for unusable arrays (the CLI turns it into InputError).
    """
    x, y = _validate(x, y_dbm, rbw, x_unit, orders, threshold_db, power_method)
    ax = _Axis(x, x_unit)
    rbw_s = rbw / ax.dx  # RBW in samples
    step = max(1, y.size // 512)
    floor_guess = _median(y[::step])
    centre_x = 0.5 * (x[0] + x[-1])
    rbw_nm = rbw if x_unit == "nm" else rbw * _C_NM_THZ / centre_x**2
    rbw_thz = rbw if x_unit == "thz" else rbw * _C_NM_THZ / centre_x**2
    flags: list[str] = []
    notes: list[str] = []

    centres, halves = _find_tones(y, ax, rbw_s, expected_thz, floor_guess, threshold_db)
    if centres.size < 2:
        found = ", ".join(f"{f:.5f} THz" for f in ax.index_to_f(centres)) or "none"
        return Reduction(
            None, floor_guess, [], [FLAG_MISSING_TONE],
            [f"missing_tone: fewer than two lines above the floor (found: {found}); "
             "give the expected tone positions"], rbw_nm, power_method,
        )
    fit_half = int(max(1, round(_FIT_HALF_RBW * rbw_s)))
    tp = _window_peaks(y, centres, int(halves.max()), fit_half)
    tone_ok = ~tp.at_edge & (tp.peak_db >= floor_guess + threshold_db)
    tone_idx = np.where(tone_ok, tp.vertex, centres)
    f_found = ax.index_to_f(tone_idx)  # same order as centres
    f_tones = np.sort(f_found)
    if expected_thz is not None and tone_ok.sum() < 2:
        # Keep the expected spacing; anchor the grid on the tone that was found, if any.
        fe = np.sort(np.asarray(expected_thz, dtype=float).ravel())
        shift = float(f_found[tone_ok][0] - fe[tone_ok][0]) if tone_ok.any() else 0.0
        f_tones = fe + shift
    f_a, delta = float(f_tones[0]), float(f_tones[1] - f_tones[0])

    ks = np.array(grid_ks(orders))
    f_grid = f_a + ks * delta
    c_grid = ax.f_to_index(f_grid)
    spacing_s = abs(float(c_grid[-1] - c_grid[0])) / max(1, ks.size - 1)
    edge = max(1.0, rbw_s)
    in_span = (c_grid >= edge) & (c_grid <= y.size - 1 - edge)
    half = int(max(2, min(max(rbw_s, 2.0), 0.3 * spacing_s)))
    pk = _window_peaks(y, c_grid, half, min(fit_half, half))

    # Floor in the middle half of each gap between grid positions, 3 RBW away from each line.
    f_gaps = f_a + (np.arange(ks[0] - 1, ks[-1] + 1) + 0.5) * delta
    gap_half = int(min(64, 0.25 * spacing_s, max(0, 0.5 * spacing_s - _GUARD_RBW * rbw_s)))
    gaps = _gap_floors(y, ax.f_to_index(f_gaps), gap_half)
    left, right = _lin(gaps[:-1]), _lin(gaps[1:])
    both = np.where(np.isnan(left), right, np.where(np.isnan(right), left, 0.5 * (left + right)))
    line_floor = np.where(np.isnan(both), floor_guess, _db(both))

    raw = pk.peak_db
    snr = raw - line_floor
    detected = in_span & ~pk.at_edge & (snr >= threshold_db)
    power = _line_power(y, pk, line_floor, rbw_s, power_method, fit_half)
    saturated = detected & (pk.plateau >= 3) & (pk.plateau > 0.3 * rbw_s + 1)
    f_meas = np.where(detected, ax.index_to_f(pk.vertex), f_grid)
    upper = np.maximum(line_floor + threshold_db, raw)

    power_l, floor_l, snr_l, upper_l = (a.tolist() for a in (power, line_floor, snr, upper))
    f_l, span_l, det_l, sat_l = f_meas.tolist(), in_span.tolist(), detected.tolist(), \
        saturated.tolist()
    lines = []
    for i, k in enumerate(ks.tolist()):
        lid = line_id(k)
        meas, det = span_l[i], det_l[i]
        lines.append(MeasuredLine(
            kind=lid.kind, side=lid.side, order=lid.order,
            freq_thz=f_l[i], wavelength_nm=_C_NM_THZ / f_l[i],
            power_dbm=_opt(power_l[i]) if det else None,
            floor_dbm=_opt(floor_l[i]) if meas else None,
            snr_db=_opt(snr_l[i]) if meas else None,
            detected=det,
            upper_limit_dbm=_opt(upper_l[i]) if (meas and not det) else None,
            saturated=sat_l[i],
        ))

    _add_flags(flags, notes, lines, in_span, delta, rbw_thz, orders)
    finite_gaps = gaps[np.isfinite(gaps)]
    floor = _median(finite_gaps) if finite_gaps.size else floor_guess
    return Reduction(delta * 1e3, floor, lines, flags, notes, rbw_nm, power_method)


def _line_power(y: np.ndarray, pk: _Peaks, floor_db: np.ndarray, rbw_s: float, method: str,
                fit_half: int) -> np.ndarray:
    """Line power (dBm) with the floor removed in linear units, by peak or by integration."""
    n = y.size
    floor_lin = _lin(floor_db)
    if method == "integrate":
        half = max(1, int(np.ceil(1.5 * rbw_s)))  # +-1.5 FWHM holds 99.96 % of a Gaussian
        idx = np.rint(pk.vertex).astype(int)[:, None] + np.arange(-half, half + 1)[None, :]
        valid = (idx >= 0) & (idx < n)
        excess = np.where(valid, _lin(y[_clip(idx, 0, n - 1)]) - floor_lin[:, None], 0.0)
        return _db(excess.sum(axis=1) / (NEB_PER_FWHM_GAUSSIAN * rbw_s))
    vertex, peak_sub, ok = _fit_parabola(y, pk.imax, fit_half, floor_lin)
    fallback = _db(_lin(pk.peak_db) - floor_lin)
    return np.where(ok & ~pk.at_edge, peak_sub, fallback)


def _add_flags(flags: list[str], notes: list[str], lines: list[MeasuredLine],
               in_span: np.ndarray, delta_thz: float, rbw_thz: float, orders: int) -> None:
    """Append flag codes and one explanatory note per flag."""
    sat = [ln.line_id.label() for ln in lines if ln.saturated]
    if sat:
        flags.append(FLAG_SATURATION)
        notes.append(f"saturation: flat top (clipped) on {', '.join(sat)}; add attenuation")
    if delta_thz < 2.0 * rbw_thz:
        flags.append(FLAG_CLOSE_LINES)
        notes.append(
            f"{FLAG_CLOSE_LINES}: spacing {delta_thz * 1e3:.2f} GHz is under 2 x RBW "
            f"({2e3 * rbw_thz:.2f} GHz); powers and floor are biased by overlap"
        )
    missing = [ln.line_id.label() for ln in lines if ln.kind == "tone" and not ln.detected]
    if missing:
        flags.append(FLAG_MISSING_TONE)
        notes.append(f"missing_tone: {', '.join(missing)} not detected at its expected position")
    if not np.all(in_span):
        outside = [ln.line_id.label() for ln, ok in zip(lines, in_span, strict=True) if not ok]
        flags.append(FLAG_SPAN)
        notes.append(f"span_too_narrow: {orders} orders asked, off the trace: {', '.join(outside)}")
