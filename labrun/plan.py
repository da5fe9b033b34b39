"""Sweep plans: the TOML model, validation with field paths, and expansion into points.

A plan names a spool, fixed settings and axes (launched power, spacing, pump wavelength,
polarisation, attenuation), how the axes nest, repeat and interleave reference points, how the OSA
is set, and when to stop. ``load_plan`` validates everything before any instrument is touched;
every mistake becomes one ``InputError`` naming the file, the field path and the reason.
"""

from __future__ import annotations

import hashlib
import math
import random
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Annotated, Any, Literal, cast

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from labrun.errors import InputError
from labrun.inputfile import FILE_MODEL_CONFIG, Number, decode, parse_toml, read_bytes
from labrun.physics.units import nm_to_thz, thz_to_nm
from labrun.profiles import generic_profile
from labrun.resources import find_file

# ITU-T G.694.1 (DWDM frequency grid): anchor 193.1 THz, fixed grids of 12.5/25/50/100 GHz.
ITU_ANCHOR_THZ = 193.1
ITU_GRIDS_GHZ = (12.5, 25.0, 50.0, 100.0)

MAX_VALUES_PER_AXIS = 10_000
MAX_POINTS = 1_000_000
# Where the lines of a plan (tones and every requested sideband) may lie: what silica fibre
# carries and grating OSAs cover (common practice).
LINE_RANGE_NM = (600.0, 2500.0)

# Plan variables: name -> (kind, low, high, unit). kind: "float", "int", "triple", "stokes".
# Bounds are sanity limits against typos; the bench caps and profile ranges are checked later.
VARIABLES: dict[str, tuple[str, float, float, str]] = {
    "power_a_dbm": ("float", -60.0, 40.0, "dBm"),
    "power_b_dbm": ("float", -60.0, 40.0, "dBm"),
    "total_power_dbm": ("float", -60.0, 43.0, "dBm"),
    "ratio_db": ("float", -40.0, 40.0, "dB"),
    "spacing_ghz": ("float", 1e-3, 20_000.0, "GHz"),
    "spacing_nm": ("float", 1e-5, 150.0, "nm"),
    "spacing_steps": ("int", 1, 2000, "grid steps"),
    "wavelength_a_nm": ("float", 1000.0, 2000.0, "nm"),
    "channel_a": ("int", -2000, 2000, "grid channels from 193.1 THz"),
    "pol_angles_deg": ("triple", -720.0, 720.0, "deg"),
    "pol_stokes": ("stokes", -1.0, 1.0, ""),
    "attenuation_a_db": ("float", 0.0, 100.0, "dB"),
    "attenuation_b_db": ("float", 0.0, 100.0, "dB"),
    "laser_a_dbm": ("float", -60.0, 40.0, "dBm"),
    "laser_b_dbm": ("float", -60.0, 40.0, "dBm"),
}
FIXED_ONLY = {"grid_ghz"}
# Setpoint names that move laser, attenuator or amplifier levels: a change of any of them is a
# power step, and its settle time applies to the power settings (engine and check agree on this).
POWER_SETPOINTS = ("power_a_dbm", "power_b_dbm", "attenuation_a_db", "attenuation_b_db",
                   "laser_a_dbm", "laser_b_dbm")

# Which setpoint names each plan variable drives (for per-axis settle times).
DRIVES: dict[str, tuple[str, ...]] = {
    "power_a_dbm": ("power_a_dbm",),
    "power_b_dbm": ("power_b_dbm",),
    "total_power_dbm": ("power_a_dbm", "power_b_dbm"),
    "ratio_db": ("power_a_dbm", "power_b_dbm"),
    "spacing_ghz": ("spacing_ghz",),
    "spacing_nm": ("spacing_ghz",),
    "spacing_steps": ("spacing_ghz",),
    "wavelength_a_nm": ("wavelength_a_nm",),
    "channel_a": ("wavelength_a_nm",),
    "pol_angles_deg": ("pol_angles_deg",),
    "pol_stokes": ("pol_stokes",),
    "attenuation_a_db": ("attenuation_a_db",),
    "attenuation_b_db": ("attenuation_b_db",),
    "laser_a_dbm": ("laser_a_dbm",),
    "laser_b_dbm": ("laser_b_dbm",),
}

# Setpoint names that identify a point (the key); wavelength_b_nm is derived and left out.
KEY_FIELDS = (
    "wavelength_a_nm", "spacing_ghz", "power_a_dbm", "power_b_dbm", "laser_a_dbm",
    "laser_b_dbm", "attenuation_a_db", "attenuation_b_db", "pol_angles_deg", "pol_stokes",
)

# RBW values a grating OSA offers, 1-2-5 sequence in nm (common practice).
RBW_STEPS_NM = (0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0)
# dB per (d/FWHM)^2 of a Gaussian filter: 10 log10(e) * 4 ln 2 (mathematical fact).
GAUSS_DB = 10.0 * math.log10(math.e) * 4.0 * math.log(2.0)
# Sample counts labrun offers (its own choice): odd, so a sample lands on the centre, and 2^n + 1,
# so each step halves the sample spacing of the one before and keeps every earlier sample.
POINT_STEPS = tuple(2**n + 1 for n in range(5, 19))  # 33 ... 262145


# ----------------------------------------------------------------------------- file structure


class _Strict(BaseModel):
    """Base for plan tables: unknown keys are errors (catches typos with their field path)."""

    model_config = ConfigDict(**FILE_MODEL_CONFIG, frozen=True)


class MetaSpec(_Strict):
    """[plan]: what is measured and how many sideband orders matter."""

    name: str = Field(min_length=1)
    spool: str = Field(min_length=1)
    note: str = ""
    orders: int = Field(3, ge=1, le=10)
    amplifier: bool = False


class AxisSpec(_Strict):
    """[axes.NAME]: one axis as values, linspace/logspace (num) or start/stop/step."""

    values: list[Any] | None = None
    start: float | None = None
    stop: float | None = None
    step: float | None = None
    num: int | None = Field(None, ge=1, le=MAX_VALUES_PER_AXIS)  # bounded before allocation
    scale: Literal["linear", "log"] = "linear"
    settle_s: float = Field(0.0, ge=0.0, le=3600.0)
    paddle: int | None = Field(None, ge=1, le=3)
    base: Annotated[tuple[Number, Number, Number] | None, Field(strict=False)] = None
    plane: Literal["s1s2", "s1s3", "s2s3"] = "s1s2"


class OrderSpec(_Strict):
    """[order]: nesting (outermost first), zipped groups, snake, repeats, shuffle, references."""

    nesting: list[str] | None = None
    zip: list[list[str]] = []
    snake: bool = False
    repeats: int = Field(1, ge=1, le=1000)
    repeat_mode: Literal["sweep", "point"] = "sweep"
    shuffle_seed: int | None = None
    reference_every: int | None = Field(None, ge=1)
    reference: dict[str, Any] = {}


class OsaSpec(_Strict):
    """[osa]: explicit values override the automatic choice field by field."""

    center_nm: float | None = Field(None, ge=LINE_RANGE_NM[0], le=LINE_RANGE_NM[1])
    span_nm: float | None = Field(None, gt=0, le=LINE_RANGE_NM[1] - LINE_RANGE_NM[0])
    rbw_nm: float | None = Field(None, ge=0.001, le=10.0)  # finer than any grating OSA: refused
    points: int | None = Field(None, ge=3, le=POINT_STEPS[-1])
    margin: float = Field(0.25, ge=0.0, le=10.0)
    min_margin_nm: float = Field(0.5, ge=0.0, le=50.0)
    samples_per_rbw: float = Field(5.0, ge=5.0, le=1000.0)
    skirt_db: float = Field(60.0, gt=0.0, le=200.0)
    sweep_s: float | None = Field(None, ge=0.0, le=3600.0)
    capture_input: bool = False
    input_every: int = Field(1, ge=1, le=MAX_POINTS)


class StopSpec(_Strict):
    """[[stop]]: a condition on the reduced lines that ends the run early."""

    when: Literal["sideband_above", "line_above", "tone_snr_below"]
    dbm: float | None = Field(None, ge=-200.0, le=60.0)  # beyond any OSA's display range
    db: float | None = Field(None, ge=0.0, le=200.0)  # an SNR threshold
    order: int | None = Field(None, ge=1, le=10)
    side: Literal["low", "high", "any"] = "any"
    tone: Literal["a", "b", "any"] = "any"
    consecutive: int = Field(1, ge=1, le=MAX_POINTS)


class SpoolSpec(_Strict):
    """[spool]: what is known of the spool named in [plan] (recorded on its spool row, optional)."""

    length_km: float | None = Field(None, gt=0.0, le=1.0e5)
    loss_db_per_km: float | None = Field(None, ge=0.0, le=100.0)
    fibre_type: str | None = Field(None, min_length=1, max_length=100)
    note: str | None = None

    def known(self) -> dict[str, Any]:
        """The fields given in the file (what a new or incomplete spool row takes)."""
        return {k: v for k, v in self.model_dump().items() if v is not None}


class PlanFile(_Strict):
    """The whole plan file."""

    plan: MetaSpec
    spool: SpoolSpec = SpoolSpec()
    fixed: dict[str, Any] = {}
    axes: dict[str, AxisSpec] = {}
    order: OrderSpec = OrderSpec()
    osa: OsaSpec = OsaSpec()
    stop: list[StopSpec] = []


# ----------------------------------------------------------------------------- public records


@dataclass(frozen=True)
class PointSpec:
    """One point of a plan: canonical setpoint, stable key (for resume), repeat and reference flag.

    setpoint names: power_a_dbm, power_b_dbm (launched into the spool), spacing_ghz,
    wavelength_a_nm, wavelength_b_nm (derived), pol_angles_deg or pol_stokes (tuples),
    attenuation_a_db / attenuation_b_db and laser_a_dbm / laser_b_dbm when the plan sets them.
    """

    index: int
    key: str
    setpoint: dict[str, Any]
    repeat: int = 0
    is_reference: bool = False


@dataclass(frozen=True)
class Axis:
    """One validated axis: plan name, values (floats or tuples), settle time, setpoint names."""

    name: str
    values: tuple[Any, ...]
    settle_s: float
    drives: tuple[str, ...]


@dataclass(frozen=True)
class StopCondition:
    """A stop condition; ``reason(lines)`` says why it fires on one point's lines, else None."""

    when: str
    threshold: float
    order: int | None = None
    side: str = "any"
    tone: str = "any"
    consecutive: int = 1

    def describe(self) -> str:
        """Human text, e.g. 'a sideband (high 1) above 5 dBm'."""
        if self.when == "tone_snr_below":
            which = "either tone" if self.tone == "any" else f"tone {self.tone}"
            text = f"SNR of {which} below {self.threshold:g} dB"
        else:
            what = "a sideband" if self.when == "sideband_above" else "any line"
            sel = []
            if self.side != "any":
                sel.append(self.side)
            if self.order is not None:
                sel.append(f"order {self.order}")
            text = f"{what}{' (' + ' '.join(sel) + ')' if sel else ''} above {self.threshold:g} dBm"
        if self.consecutive > 1:
            text += f" on {self.consecutive} consecutive points"
        return text

    def reason(self, lines: Iterable[Any]) -> str | None:
        """Why this condition fires on one point's lines (dicts or objects), or None."""
        for line in lines:
            kind, side, order = _get(line, "kind"), _get(line, "side"), _get(line, "order")
            power, detected = _get(line, "power_dbm"), _get(line, "detected", True)
            if self.when == "tone_snr_below":
                if kind != "tone" or (self.tone != "any" and side != _TONE_SIDE[self.tone]):
                    continue
                snr = _get(line, "snr_db")
                if not detected or snr is None or snr < self.threshold:
                    label = "tone a" if side == "low" else "tone b"
                    shown = "undetected" if snr is None or not detected else f"{snr:.1f} dB"
                    return f"{label} SNR {shown} < {self.threshold:g} dB"
                continue
            if self.when == "sideband_above" and kind != "sideband":
                continue
            if self.side != "any" and side != self.side:
                continue
            if self.order is not None and order != self.order:
                continue
            if detected and power is not None and power > self.threshold:
                return f"{kind} {side} {order} at {power:.2f} dBm > {self.threshold:g} dBm"
        return None


_TONE_SIDE = {"a": "low", "b": "high"}


def _get(obj: Any, name: str, default: Any = None) -> Any:
    """Attribute or mapping item, so stop conditions accept dicts and dataclasses alike."""
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


class StopWatch:
    """Tracks stop conditions over successive points (handles ``consecutive``)."""

    def __init__(self, conditions: Sequence[StopCondition]):
        self.conditions = list(conditions)
        self._streak = [0] * len(self.conditions)

    def update(self, lines: Iterable[Any]) -> str | None:
        """Feed one point's lines; returns the reason to stop, or None to go on."""
        lines = list(lines)
        for i, cond in enumerate(self.conditions):
            why = cond.reason(lines)
            self._streak[i] = self._streak[i] + 1 if why else 0
            if why and self._streak[i] >= cond.consecutive:
                return f"stop condition {i + 1} ({cond.describe()}): {why}"
        return None


@dataclass(frozen=True)
class OsaSettings:
    """OSA settings for a plan, with the reason for each choice in plain text.

    When the pump wavelength varies, ``per_point_center`` is true and ``for_point`` re-centres.
    """

    center_nm: float
    span_nm: float
    rbw_nm: float
    points: int
    reason: str
    per_point_center: bool = False
    warnings: tuple[str, ...] = ()
    sweep_estimate_s: float = 0.0
    orders: int = 3

    def for_point(self, setpoint: Mapping[str, Any]) -> OsaSettings:
        """Settings for one point: re-centred on its lines when the centre follows the pump."""
        if not self.per_point_center:
            return self
        lo, hi = line_extent_nm(setpoint["wavelength_a_nm"], setpoint["spacing_ghz"], self.orders)
        return replace(self, center_nm=round((lo + hi) / 2.0, 4))

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly form."""
        return {
            "center_nm": self.center_nm, "span_nm": self.span_nm, "rbw_nm": self.rbw_nm,
            "points": self.points, "per_point_center": self.per_point_center,
            "sweep_estimate_s": self.sweep_estimate_s, "reason": self.reason,
            "warnings": list(self.warnings),
        }


# ----------------------------------------------------------------------------- grid and lines


def itu_grid_thz(n: int, grid_ghz: float = 50.0) -> float:
    """Frequency of channel n on the ITU-T G.694.1 grid: 193.1 THz + n * grid."""
    if grid_ghz not in ITU_GRIDS_GHZ:
        raise ValueError(f"grid_ghz must be one of {ITU_GRIDS_GHZ}")
    return round(ITU_ANCHOR_THZ + n * grid_ghz / 1000.0, 9)


def spacing_nm_to_ghz(spacing_nm: float, wavelength_a_nm: float) -> float:
    """Tone spacing in GHz when tone b sits ``spacing_nm`` below tone a in wavelength (exact)."""
    return float(nm_to_thz(wavelength_a_nm - spacing_nm) - nm_to_thz(wavelength_a_nm)) * 1000.0


def wavelength_b_nm(wavelength_a_nm: float, spacing_ghz: float) -> float:
    """Wavelength of tone b, which sits ``spacing_ghz`` above tone a in frequency."""
    return float(thz_to_nm(nm_to_thz(wavelength_a_nm) + spacing_ghz / 1000.0))


def line_extent_nm(wavelength_a_nm: float, spacing_ghz: float, orders: int) -> tuple[float, float]:
    """Wavelengths (low, high) of the outermost lines: high sideband n and low sideband n."""
    f_a = float(nm_to_thz(wavelength_a_nm))
    d = spacing_ghz / 1000.0
    return float(thz_to_nm(f_a + (orders + 1) * d)), float(thz_to_nm(f_a - orders * d))


def estimate_sweep_s(span_nm: float, rbw_nm: float, points: int) -> float:
    """Rough grating-OSA sweep time: 0.2 s overhead + 0.1 ms per sample (from memory, rough)."""
    del span_nm, rbw_nm  # a finer RBW needs no more time per sample at normal sensitivity
    return round(0.2 + 1e-4 * points, 3)


def osa_sweep_model(bench: Any) -> Any:
    """The bench OSA profile's ``[trace.sweep_time]`` model, or None."""
    spec = getattr(bench, "instruments", {}).get("osa") if bench is not None else None
    trace = getattr(getattr(spec, "profile", None), "trace", None)
    return getattr(trace, "sweep_time", None)


def sweep_model_s(bench: Any, span_nm: float, rbw_nm: float, points: int) -> float:
    """Seconds per sweep: the bench OSA profile's model when it has one, else the rough guess."""
    model = osa_sweep_model(bench)
    if model is not None:
        return round(float(model.seconds(span_nm, rbw_nm, points)), 4)
    return estimate_sweep_s(span_nm, rbw_nm, points)


# ----------------------------------------------------------------------------- loading


def _fail(file: str, field: str, reason: str) -> InputError:
    """One-line input error naming file, field path and reason."""
    return InputError(reason, file=file, field=field)


def _loc(loc: Sequence[Any]) -> str:
    """pydantic location tuple -> dotted field path (list items as [i])."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def load_plan(path: str | Path) -> Plan:
    """Read, validate and expand a plan file; raises InputError naming file and field.

    A name that is not an existing path is looked up among the shipped plans (``sweeps/``), so
    ``power-sweep.toml`` works from any folder.
    """
    p = find_file(path, "sweeps", suffixes=("", ".toml")) or Path(path)
    fname = str(path) if p == Path(path) else str(p)
    return parse_plan(read_bytes(p, name=fname), fname)


def parse_plan(raw: bytes, file: str = "<plan>") -> Plan:
    """Validate plan bytes (TOML); ``file`` names the source in errors."""
    data = parse_toml(decode(raw, file), file)
    try:
        spec = PlanFile.model_validate(data)
    except ValidationError as exc:
        err = exc.errors()[0]
        msg = err["msg"]
        if err["type"] == "missing":
            msg = "required field is missing"
        elif err["type"] == "extra_forbidden":
            msg = "unknown field"
        raise _fail(file, _loc(err["loc"]), msg) from None
    return Plan(spec, raw, file)


# ----------------------------------------------------------------------------- the plan


class Plan:
    """A validated plan: metadata, fixed settings, axes, ordering, OSA choice, stop conditions."""

    def __init__(self, spec: PlanFile, raw: bytes, file: str):
        self.spec = spec
        self.file = file
        self.path = Path(file)
        self.raw = raw
        self.text = raw.decode("utf-8-sig")
        self.sha256 = hashlib.sha256(raw).hexdigest()
        self.name = spec.plan.name
        self.spool = spec.plan.spool
        self.spool_info = spec.spool.known()
        self.note = spec.plan.note
        self.orders = spec.plan.orders
        self.amplifier = spec.plan.amplifier
        self.osa = spec.osa
        self.capture_input = spec.osa.capture_input
        self.fixed = self._validate_fixed(spec.fixed)
        self.axes = [self._validate_axis(n, a) for n, a in spec.axes.items()]
        self._check_defined()
        self.levels = self._levels()
        self.stop_conditions = [self._stop(i, s) for i, s in enumerate(spec.stop)]
        self.axis_settle_s = {a.name: a.settle_s for a in self.axes}
        self.settle_s: dict[str, float] = {}
        for a in self.axes:
            for name in a.drives:
                self.settle_s[name] = max(self.settle_s.get(name, 0.0), a.settle_s)
        self._points = self._expand()

    # -- fixed and axes

    def _validate_fixed(self, fixed: Mapping[str, Any]) -> dict[str, Any]:
        """Check each fixed setting's name, type and sanity range."""
        out: dict[str, Any] = {}
        for name, value in fixed.items():
            path = f"fixed.{name}"
            if name == "grid_ghz":
                if not _is_number(value) or float(value) not in ITU_GRIDS_GHZ:
                    raise _fail(self.file, path, f"must be one of {list(ITU_GRIDS_GHZ)} "
                                "(ITU-T G.694.1 fixed grids)")
                out[name] = float(value)
                continue
            if name not in VARIABLES:
                raise _fail(self.file, path, f"unknown setting; expected one of "
                            f"{', '.join(sorted([*VARIABLES, *FIXED_ONLY]))}")
            out[name] = self._value(name, value, path)
        return out

    def _value(self, name: str, value: Any, path: str) -> Any:
        """Validate one value of variable ``name`` (number, integer or triple)."""
        kind, lo, hi, unit = VARIABLES[name]
        if kind in ("triple", "stokes"):
            if (not isinstance(value, (list, tuple)) or len(value) != 3
                    or not all(_is_number(v) for v in value)):
                raise _fail(self.file, path, "must be a list of three numbers")
            vals = tuple(_tidy(float(v)) for v in value)
            if any(not lo <= v <= hi for v in vals):
                raise _fail(self.file, path, f"each component must lie in [{lo:g}, {hi:g}]")
            if kind == "stokes" and abs(math.sqrt(sum(v * v for v in vals)) - 1.0) > 1e-3:
                raise _fail(self.file, path, "Stokes vector (s1, s2, s3) must have unit length")
            return vals
        if not _is_number(value):
            raise _fail(self.file, path, "must be a number")
        v = float(value)
        if kind == "int":
            if v != int(v):
                raise _fail(self.file, path, "must be a whole number")
            v = int(v)
        if not lo <= v <= hi:
            raise _fail(self.file, path, f"{value} {unit} is outside the sane range "
                        f"[{lo:g}, {hi:g}] {unit}")
        return _tidy(v) if isinstance(v, float) else v

    def _validate_axis(self, name: str, spec: AxisSpec) -> Axis:
        """Expand one axis into its values and check them."""
        path = f"axes.{name}"
        if name not in VARIABLES:
            raise _fail(self.file, path, f"unknown axis; expected one of "
                        f"{', '.join(sorted(VARIABLES))}")
        if name in self.fixed:
            raise _fail(self.file, path, f"also given in [fixed] as fixed.{name}")
        kind = VARIABLES[name][0]
        extra = {"paddle": spec.paddle, "base": spec.base}
        if kind != "triple" and any(v is not None for v in extra.values()):
            bad = next(k for k, v in extra.items() if v is not None)
            raise _fail(self.file, f"{path}.{bad}", "only for axes.pol_angles_deg")
        if kind == "triple" and spec.values is None:
            if spec.paddle is None:
                raise _fail(self.file, f"{path}.paddle", "give values = [[a1, a2, a3], ...] "
                            "or paddle = 1..3 with start/stop")
            base = spec.base or (0.0, 0.0, 0.0)
            angles = self._numeric(name, spec, path, check=False)
            values: list[Any] = []
            for i, ang in enumerate(angles):
                t = list(base)
                t[spec.paddle - 1] = ang
                values.append(self._value(name, t, f"{path}.stop" if i else f"{path}.start"))
        elif kind == "stokes" and spec.values is None:
            angles = self._numeric(name, spec, path, check=False)
            values = [self._stokes_on_circle(a, spec.plane) for a in angles]
        elif kind in ("triple", "stokes"):
            self._form(spec, path)
            values = [self._value(name, v, f"{path}.values[{i}]")
                      for i, v in enumerate(spec.values or [])]
        else:
            values = self._numeric(name, spec, path, check=True)
        if len(values) > MAX_VALUES_PER_AXIS:
            raise _fail(self.file, path, f"{len(values)} values; at most {MAX_VALUES_PER_AXIS}")
        seen: set[Any] = set()
        for i, v in enumerate(values):
            if v in seen:
                where = f"{path}.values[{i}]" if spec.values is not None else path
                raise _fail(self.file, where, f"value {v} appears twice (points must differ)")
            seen.add(v)
        return Axis(name, tuple(values), spec.settle_s, DRIVES[name])

    @staticmethod
    def _stokes_on_circle(angle_deg: float, plane: str) -> tuple[float, float, float]:
        """Unit Stokes vector at ``angle_deg`` from +s_first on the great circle in ``plane``."""
        c, s = math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))
        idx = {"s1s2": (0, 1), "s1s3": (0, 2), "s2s3": (1, 2)}[plane]
        vec = [0.0, 0.0, 0.0]
        vec[idx[0]], vec[idx[1]] = c, s
        return tuple(_tidy(v) + 0.0 for v in vec)  # type: ignore[return-value]

    def _form(self, spec: AxisSpec, path: str) -> str:
        """Which form an axis uses: 'values', 'num' or 'step'; rejects mixtures."""
        has_range = spec.start is not None or spec.stop is not None
        if spec.values is not None:
            if has_range or spec.step is not None or spec.num is not None:
                raise _fail(self.file, path, "give either values or start/stop, not both")
            if not spec.values:
                raise _fail(self.file, f"{path}.values", "must not be empty")
            if spec.scale != "linear":
                raise _fail(self.file, f"{path}.scale", "only with start/stop/num")
            return "values"
        if spec.start is None:
            raise _fail(self.file, f"{path}.start", "required field is missing "
                        "(or give values = [...])")
        if spec.stop is None:
            raise _fail(self.file, f"{path}.stop", "required field is missing")
        if (spec.step is None) == (spec.num is None):
            raise _fail(self.file, f"{path}.step", "give exactly one of step or num")
        if spec.scale == "log" and spec.num is None:
            raise _fail(self.file, f"{path}.scale", "log scale needs num, not step")
        return "num" if spec.num is not None else "step"

    def _numeric(self, name: str, spec: AxisSpec, path: str, *, check: bool) -> list[Any]:
        """Numbers of an axis from values, linspace/logspace or start/stop/step."""
        form = self._form(spec, path)
        if form == "values":
            return [self._value(name, v, f"{path}.values[{i}]") if check
                    else self._plain_number(v, f"{path}.values[{i}]")
                    for i, v in enumerate(spec.values or [])]
        start, stop = float(spec.start), float(spec.stop)  # type: ignore[arg-type]
        if form == "num":
            n = int(spec.num)  # type: ignore[arg-type]
            if spec.scale == "log":
                for fld, v in (("start", start), ("stop", stop)):
                    if v <= 0:
                        raise _fail(self.file, f"{path}.{fld}", "log scale needs values > 0")
                raw = np.geomspace(start, stop, n) if n > 1 else np.array([start])
            else:
                raw = np.linspace(start, stop, n) if n > 1 else np.array([start])
        else:
            step = float(spec.step)  # type: ignore[arg-type]
            if step == 0:
                raise _fail(self.file, f"{path}.step", "must not be zero")
            if (stop - start) * step < 0:
                raise _fail(self.file, f"{path}.step", f"sign of step {step:g} does not go "
                            f"from start {start:g} towards stop {stop:g}")
            count = (stop - start) / step  # may overflow to inf: checked before int()
            if not count < MAX_VALUES_PER_AXIS:
                raise _fail(self.file, f"{path}.step", f"gives more than {MAX_VALUES_PER_AXIS} "
                            "values")
            n = int(math.floor(count + 1e-9)) + 1
            raw = start + step * np.arange(n)
        if len(raw) > MAX_VALUES_PER_AXIS:
            raise _fail(self.file, f"{path}.num", f"at most {MAX_VALUES_PER_AXIS} values")
        if check:
            for fld, v in (("start", start), ("stop", stop)):
                self._value(name, v, f"{path}.{fld}")
            if VARIABLES[name][0] == "int":
                if any(float(v) != round(float(v)) for v in raw):
                    raise _fail(self.file, f"{path}.step", "must give whole numbers")
                return [int(round(float(v))) for v in raw]
        return [_tidy(float(v)) for v in raw]

    def _plain_number(self, value: Any, path: str) -> float:
        """A bare number (used for paddle angles and great-circle angles)."""
        if not _is_number(value):
            raise _fail(self.file, path, "must be a number")
        return _tidy(float(value))

    def _check_defined(self) -> None:
        """Each quantity must be set exactly one way, across [fixed] and [axes]."""
        have = set(self.fixed) | {a.name for a in self.axes}
        where = {n: f"fixed.{n}" for n in self.fixed} | {a.name: f"axes.{a.name}"
                                                        for a in self.axes}

        def one_of(names: Sequence[str], what: str, required: bool = True) -> str | None:
            got = [n for n in names if n in have]
            if len(got) > 1:
                raise _fail(self.file, where[got[1]], f"{what} is already set by {where[got[0]]}")
            if not got and required:
                raise _fail(self.file, "fixed", f"{what} is not set: give one of "
                            f"{', '.join(names)} in [fixed] or [axes]")
            return got[0] if got else None

        wl = one_of(["wavelength_a_nm", "channel_a"], "the pump wavelength")
        sp = one_of(["spacing_ghz", "spacing_nm", "spacing_steps"], "the tone spacing")
        if (wl == "channel_a" or sp == "spacing_steps") and "grid_ghz" not in self.fixed:
            raise _fail(self.file, "fixed.grid_ghz", "required with channel_a or spacing_steps "
                        f"(one of {list(ITU_GRIDS_GHZ)})")
        one_of(["pol_angles_deg", "pol_stokes"], "the polarisation", required=False)
        total = "total_power_dbm" in have
        if total != ("ratio_db" in have):
            missing = "ratio_db" if total else "total_power_dbm"
            raise _fail(self.file, f"fixed.{missing}", "total_power_dbm and ratio_db go together")
        for arm in ("a", "b"):
            modes = [n for n in (f"power_{arm}_dbm", f"attenuation_{arm}_db") if n in have]
            if total:
                modes.insert(0, "total_power_dbm")
            if not modes:
                raise _fail(self.file, "fixed", f"launched power of tone {arm} is not set: give "
                            f"power_{arm}_dbm, total_power_dbm with ratio_db, or "
                            f"attenuation_{arm}_db with laser_{arm}_dbm")
            if len(modes) > 1:
                raise _fail(self.file, where[modes[1]], f"power of tone {arm} is already set "
                            f"by {where[modes[0]]}")
            if modes[0].startswith("attenuation") and f"laser_{arm}_dbm" not in have:
                raise _fail(self.file, f"fixed.laser_{arm}_dbm", f"required with "
                            f"attenuation_{arm}_db (launched = laser - attenuation - path loss)")
        if self.amplifier and any(f"attenuation_{a}_db" in have for a in "ab"):
            raise _fail(self.file, "plan.amplifier", "with the amplifier, set launched powers "
                        "(power_*_dbm or total_power_dbm), not attenuations")
        if not self.axes:
            raise _fail(self.file, "axes", "a plan needs at least one axis")

    # -- ordering

    def _levels(self) -> list[list[Axis]]:
        """Group axes into nesting levels (outermost first); zipped axes share a level."""
        order = self.spec.order
        by_name = {a.name: a for a in self.axes}
        group_of: dict[str, int] = {}
        for gi, group in enumerate(order.zip):
            if len(group) < 2:
                raise _fail(self.file, f"order.zip[{gi}]", "a zipped group needs two or more axes")
            for name in group:
                if name not in by_name:
                    raise _fail(self.file, f"order.zip[{gi}]", f"'{name}' is not an axis")
                if name in group_of:
                    raise _fail(self.file, f"order.zip[{gi}]", f"'{name}' is in two groups")
                group_of[name] = gi
            lengths = {len(by_name[n].values) for n in group}
            if len(lengths) > 1:
                detail = ", ".join(f"{n}: {len(by_name[n].values)}" for n in group)
                raise _fail(self.file, f"order.zip[{gi}]", f"zipped axes need equal lengths "
                            f"({detail})")
        nesting = order.nesting if order.nesting is not None else [a.name for a in self.axes]
        levels: list[list[Axis]] = []
        placed: set[str] = set()
        for i, name in enumerate(nesting):
            if name not in by_name:
                raise _fail(self.file, f"order.nesting[{i}]", f"'{name}' is not an axis")
            if name in placed:
                if name in group_of:
                    continue
                raise _fail(self.file, f"order.nesting[{i}]", f"'{name}' appears twice")
            members = order.zip[group_of[name]] if name in group_of else [name]
            levels.append([by_name[m] for m in members])
            placed.update(members)
        missing = [a.name for a in self.axes if a.name not in placed]
        if missing:
            raise _fail(self.file, "order.nesting", f"axis '{missing[0]}' is not listed")
        if order.snake and order.shuffle_seed is not None:
            raise _fail(self.file, "order.snake", "snake and shuffle_seed exclude each other")
        return levels

    def _combos(self) -> list[tuple[int, ...]]:
        """Level index tuples in nesting order, plain or snake (reflected: one level moves)."""
        sizes = [len(level[0].values) for level in self.levels]
        total = math.prod(sizes)
        if total * self.spec.order.repeats > MAX_POINTS:
            raise _fail(self.file, "axes", f"{total * self.spec.order.repeats} points; at most "
                        f"{MAX_POINTS}")
        return list(_snake(sizes) if self.spec.order.snake else np.ndindex(*sizes))

    def _assignment(self, combo: Sequence[int]) -> dict[str, Any]:
        """Plan variables (fixed plus the axes' values) for one combo."""
        out = dict(self.fixed)
        for level, i in zip(self.levels, combo, strict=True):
            for axis in level:
                out[axis.name] = axis.values[i]
        return out

    def _expand(self) -> list[PointSpec]:
        """All points in measurement order, with repeats, shuffle and reference points."""
        order = self.spec.order
        combos = self._combos()
        items: list[tuple[tuple[int, ...], int]] = []
        if order.repeat_mode == "point":
            items = [(c, r) for c in combos for r in range(order.repeats)]
        else:
            for r in range(order.repeats):
                in_order = combos[::-1] if order.snake and r % 2 else combos
                items.extend((c, r) for c in in_order)
        if order.shuffle_seed is not None:
            random.Random(order.shuffle_seed).shuffle(items)
        regular = [(self._setpoint(self._assignment(c), "axes"), r, False) for c, r in items]
        seq: list[tuple[dict[str, Any], int, bool]] = regular
        if order.reference_every is not None:
            ref = self._reference()
            seq = _interleave(regular, ref, order.reference_every)
        elif order.reference:
            raise _fail(self.file, "order.reference", "needs order.reference_every")
        points = []
        seen: dict[str, int] = {}
        for i, (sp, rep, is_ref) in enumerate(seq):
            key = point_key(sp, rep, is_ref)
            if key in seen:
                raise _fail(self.file, "axes", f"points {seen[key]} and {i} have the same "
                            f"setpoint ({key}); make the axis values differ")
            seen[key] = i
            points.append(PointSpec(i, key, sp, rep, is_ref))
        return points

    def _reference(self) -> dict[str, Any]:
        """Reference setpoint: the first point's variables with [order.reference] overrides."""
        assign = self._assignment(self._combos()[0])
        for name, value in self.spec.order.reference.items():
            path = f"order.reference.{name}"
            if name not in VARIABLES:
                raise _fail(self.file, path, "unknown setting")
            if name not in assign:
                raise _fail(self.file, path, "not a setting of this plan")
            assign[name] = self._value(name, value, path)
        return self._setpoint(assign, "order.reference")

    def _setpoint(self, v: Mapping[str, Any], where: str) -> dict[str, Any]:
        """Canonical setpoint from plan variables (launched powers, spacing in GHz, ...)."""
        grid = cast(float, v.get("grid_ghz"))  # set whenever channel_a or spacing_steps is
        wl = v["wavelength_a_nm"] if "wavelength_a_nm" in v else float(thz_to_nm(
            itu_grid_thz(v["channel_a"], grid)))
        if "spacing_ghz" in v:
            sp = v["spacing_ghz"]
        elif "spacing_nm" in v:
            if v["spacing_nm"] >= wl / 2:
                raise _fail(self.file, where, "spacing_nm is larger than half the wavelength")
            sp = spacing_nm_to_ghz(v["spacing_nm"], wl)
        else:
            sp = v["spacing_steps"] * grid
        self._check_lines(wl, sp, where)
        out: dict[str, Any] = {"wavelength_a_nm": _tidy(wl), "spacing_ghz": _tidy(sp),
                               "wavelength_b_nm": _tidy(wavelength_b_nm(wl, sp))}
        if "total_power_dbm" in v:
            r = v["ratio_db"]
            pa = v["total_power_dbm"] - 10.0 * math.log10(1.0 + 10.0 ** (r / 10.0))
            out["power_a_dbm"], out["power_b_dbm"] = _tidy(pa), _tidy(pa + r)
        for arm in ("a", "b"):
            for name in (f"power_{arm}_dbm", f"attenuation_{arm}_db", f"laser_{arm}_dbm"):
                if name in v:
                    out[name] = v[name]
        for name in ("pol_angles_deg", "pol_stokes"):
            if name in v:
                out[name] = tuple(v[name])
        if self.amplifier:
            out["amplifier"] = True
        return out

    def _check_lines(self, wavelength_a_nm: float, spacing_ghz: float, where: str) -> None:
        """Every line up to plan.orders must lie in LINE_RANGE_NM (and at a positive frequency)."""
        f_a, d = float(nm_to_thz(wavelength_a_nm)), spacing_ghz / 1000.0
        f_low, f_high = f_a - self.orders * d, f_a + (self.orders + 1) * d
        lo_nm, hi_nm = LINE_RANGE_NM
        if not (float(nm_to_thz(hi_nm)) <= f_low and f_high <= float(nm_to_thz(lo_nm))):
            raise _fail(self.file, where, f"tone a at {wavelength_a_nm:.6g} nm with spacing "
                        f"{spacing_ghz:g} GHz puts order-{self.orders} lines outside "
                        f"{lo_nm:g}-{hi_nm:g} nm; lower the spacing or plan.orders")

    def _stop(self, i: int, s: StopSpec) -> StopCondition:
        """Validate one [[stop]] entry."""
        path = f"stop[{i}]"
        if s.when == "tone_snr_below":
            if s.db is None:
                raise _fail(self.file, f"{path}.db", "required for tone_snr_below")
            if s.dbm is not None:
                raise _fail(self.file, f"{path}.dbm", "not used by tone_snr_below (use db)")
            return StopCondition(s.when, s.db, tone=s.tone, consecutive=s.consecutive)
        if s.dbm is None:
            raise _fail(self.file, f"{path}.dbm", f"required for {s.when}")
        if s.db is not None:
            raise _fail(self.file, f"{path}.db", f"not used by {s.when} (use dbm)")
        if s.tone != "any":
            raise _fail(self.file, f"{path}.tone", "only for tone_snr_below")
        return StopCondition(s.when, s.dbm, order=s.order, side=s.side,
                             consecutive=s.consecutive)

    # -- public

    def points(self) -> list[PointSpec]:
        """Every point in measurement order (deterministic: same file, same list)."""
        return list(self._points)

    def osa_settings(self, bench: Any = None) -> OsaSettings:
        """OSA centre, span, RBW and sample count for this plan, with the reasons."""
        return choose_osa_settings(self, bench)

    def summary(self) -> dict[str, Any]:
        """Short JSON-friendly description (name, spool, axes, ordering)."""
        o = self.spec.order
        return {
            "name": self.name, "spool": self.spool, "note": self.note, "file": self.file,
            "sha256": self.sha256, "orders": self.orders, "amplifier": self.amplifier,
            "axes": {a.name: {"n": len(a.values), "first": a.values[0], "last": a.values[-1],
                              "settle_s": a.settle_s} for a in self.axes},
            "nesting": [[a.name for a in level] for level in self.levels],
            "snake": o.snake, "repeats": o.repeats, "repeat_mode": o.repeat_mode,
            "shuffle_seed": o.shuffle_seed, "reference_every": o.reference_every,
            "stop_conditions": [c.describe() for c in self.stop_conditions],
        }


# ----------------------------------------------------------------------------- helpers


def point_key(setpoint: Mapping[str, Any], repeat: int, is_reference: bool) -> str:
    """Stable identity of a point: its setpoint values, repeat number and reference flag."""
    parts = ["ref" if is_reference else "pt"]
    for name in KEY_FIELDS:
        if name in setpoint:
            parts.append(f"{name}={_fmt(setpoint[name])}")
    parts.append(f"r{repeat}")
    return "|".join(parts)


def _fmt(value: Any) -> str:
    """Canonical text of a setpoint value (10 significant digits, no float noise)."""
    if isinstance(value, (tuple, list)):
        return ",".join(_fmt(v) for v in value)
    if isinstance(value, float):
        text = f"{value:.10g}"
        return "0" if text == "-0" else text
    return str(value)


def _tidy(v: float) -> float:
    """Round away float noise (12 significant digits) so keys and JSON stay clean."""
    return float(f"{v:.12g}")


def _is_number(v: Any) -> bool:
    """True for int/float (not bool) and finite."""
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _snake(sizes: Sequence[int]) -> Iterator[tuple[int, ...]]:
    """Reflected (boustrophedon) order: between neighbours only one level index moves by one."""
    if not sizes:
        yield ()
        return
    inner = list(_snake(sizes[1:]))
    for i in range(sizes[0]):
        for rest in (inner if i % 2 == 0 else reversed(inner)):
            yield (i, *rest)


def _interleave(regular: list[tuple[dict[str, Any], int, bool]], ref: dict[str, Any],
                every: int) -> list[tuple[dict[str, Any], int, bool]]:
    """Reference point first, after every ``every`` regular points, and last."""
    out: list[tuple[dict[str, Any], int, bool]] = []
    n_ref = 0
    for i, item in enumerate(regular):
        if i % every == 0:
            out.append((dict(ref), n_ref, True))
            n_ref += 1
        out.append(item)
    out.append((dict(ref), n_ref, True))
    return out


# ----------------------------------------------------------------------------- OSA choice


def op_range(bench: Any, role: str, op: str) -> tuple[float, float] | None:
    """Allowed value range of a profile operation on the bench, or None if unknown."""
    if bench is None:
        return None
    spec = getattr(bench, "instruments", {}).get(role)
    if spec is None:
        return None
    operation = getattr(spec.profile, "operations", {}).get(op)
    rng = getattr(operation, "range", None)
    return (float(rng[0]), float(rng[1])) if rng else None


def _osa_range(bench: Any, op: str) -> tuple[float, float]:
    """The bench OSA's range for ``op``; without one (no bench, or the profile maps no such
    setting), the generic OSA profile's."""
    rng = op_range(bench, "osa", op) or generic_profile("osa").op(op).range
    assert rng is not None  # the generic profile ranges every setting (profiles refuse less)
    return (float(rng[0]), float(rng[1]))


def op_settle(bench: Any, role: str, op: str) -> float:
    """Settle time of a profile operation (0 when unknown)."""
    spec = getattr(bench, "instruments", {}).get(role) if bench is not None else None
    if spec is None:
        return 0.0
    operation = getattr(spec.profile, "operations", {}).get(op)
    return float(getattr(operation, "settle_s", 0.0) or 0.0)


def choose_osa_settings(plan: Plan, bench: Any = None) -> OsaSettings:
    """Span covering every requested order with margin, RBW <= spacing/4, >= 5 samples per RBW."""
    spec, orders = plan.osa, plan.orders
    pts = plan.points()
    extents = [line_extent_nm(p.setpoint["wavelength_a_nm"], p.setpoint["spacing_ghz"], orders)
               for p in pts]
    per_point = len({p.setpoint["wavelength_a_nm"] for p in pts}) > 1 and spec.center_nm is None
    if per_point:
        width = max(hi - lo for lo, hi in extents)
        first = extents[0]
        center = (first[0] + first[1]) / 2.0
        cover = f"the widest point's lines ({width:.3f} nm, low {orders} .. high {orders})"
    else:
        lo, hi = min(e[0] for e in extents), max(e[1] for e in extents)
        width, center = hi - lo, (lo + hi) / 2.0
        cover = f"low {orders} .. high {orders} of every point ({lo:.3f}-{hi:.3f} nm)"
    warnings: list[str] = []
    reasons: list[str] = []

    if spec.center_nm is not None:
        center = spec.center_nm
        reasons.append(f"centre {center:g} nm as given")
        lo, hi = min(e[0] for e in extents), max(e[1] for e in extents)
        width = 2 * max(center - lo, hi - center)
    else:
        follow = " (follows the pump at each point)" if per_point else ""
        reasons.append(f"centre {center:.4f} nm = middle of the lines{follow}")

    margin = max(spec.margin * width, spec.min_margin_nm)
    need_span = width + 2 * margin
    if spec.span_nm is not None:
        span = spec.span_nm
        reasons.append(f"span {span:g} nm as given")
        if span < width:
            warnings.append(f"span {span:g} nm does not cover {cover}: needs >= {width:.3f} nm")
    else:
        span = math.ceil(need_span * 10 - 1e-9) / 10.0
        reasons.append(f"span {span:g} nm covers {cover} plus {margin:.2f} nm margin each side")

    # RBW must resolve the closest lines: <= spacing/4 at the closest spacing (in nm), and fine
    # enough that a Gaussian RBW filter's skirt midway between lines is skirt_db down, so the floor
    # read there is the OSA's and not the tones' (Gaussian: -10 log10(e) 4 ln2 (d/FWHM)^2 dB).
    sp_nm = min(p.setpoint["wavelength_a_nm"] - p.setpoint["wavelength_b_nm"] for p in pts)
    sp_ghz = min(p.setpoint["spacing_ghz"] for p in pts)
    skirt_limit = sp_nm / (2.0 * math.sqrt(spec.skirt_db / GAUSS_DB))
    limit = min(sp_nm / 4.0, skirt_limit)
    why_limit = (f"spacing/4 = {sp_nm / 4:.4f} nm" if limit == sp_nm / 4.0 else
                 f"{limit:.4f} nm (spacing/4 = {sp_nm / 4:.4f} nm, tightened so a Gaussian RBW "
                 f"skirt is {spec.skirt_db:g} dB down midway between lines)")
    rbw_rng = _osa_range(bench, "set_rbw_nm")
    if spec.rbw_nm is not None:
        rbw = spec.rbw_nm
        reasons.append(f"RBW {rbw:g} nm as given")
        if rbw > sp_nm / 4.0 * (1 + 1e-9):
            warnings.append(f"RBW {rbw:g} nm exceeds spacing/4 = {sp_nm / 4:.4f} nm "
                            f"({sp_ghz:g} GHz): neighbouring lines may merge")
    else:
        allowed = [r for r in RBW_STEPS_NM if r <= limit * (1 + 1e-9) and
                   rbw_rng[0] - 1e-12 <= r <= rbw_rng[1] + 1e-12]
        if allowed:
            rbw = allowed[-1]
            reasons.append(f"RBW {rbw:g} nm = largest 1-2-5 step <= {why_limit} "
                           f"(closest spacing {sp_ghz:g} GHz = {sp_nm:.4f} nm)")
        else:
            rbw = rbw_rng[0]
            reasons.append(f"RBW {rbw:g} nm = the OSA's finest")
            warnings.append(f"the OSA's finest RBW {rbw:g} nm exceeds {why_limit} "
                            f"({sp_ghz:g} GHz): neighbouring lines may merge")

    pts_rng = _osa_range(bench, "set_points")
    need_pts = math.ceil(spec.samples_per_rbw * span / rbw) + 1
    if spec.points is not None:
        n = spec.points
        reasons.append(f"{n} samples as given")
    else:
        fits = [p for p in POINT_STEPS if p >= need_pts and pts_rng[0] <= p <= pts_rng[1]]
        n = fits[0] if fits else int(pts_rng[1])
        reasons.append(f"{n} samples = smallest usual count >= {need_pts} "
                       f"({spec.samples_per_rbw:g} per RBW)")
    per_rbw = (n - 1) * rbw / span
    reasons.append(f"{per_rbw:.1f} samples per RBW")
    if per_rbw < 5 - 1e-9:
        warnings.append(f"only {per_rbw:.1f} samples per RBW (< 5): peak powers will be low")
    sweep = spec.sweep_s if spec.sweep_s is not None else sweep_model_s(bench, span, rbw, n)
    sweep += op_settle(bench, "osa", "sweep")
    return OsaSettings(center_nm=round(center, 4), span_nm=round(span, 4), rbw_nm=rbw, points=n,
                       reason="; ".join(reasons), per_point_center=per_point,
                       warnings=tuple(warnings), sweep_estimate_s=round(sweep, 4), orders=orders)


__all__ = [
    "ITU_ANCHOR_THZ", "ITU_GRIDS_GHZ", "Axis", "OsaSettings", "Plan", "PointSpec",
    "StopCondition", "StopWatch", "choose_osa_settings", "estimate_sweep_s", "itu_grid_thz",
    "line_extent_nm", "load_plan", "parse_plan", "point_key", "spacing_nm_to_ghz",
    "wavelength_b_nm",
]
