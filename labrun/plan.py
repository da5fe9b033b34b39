"""Sweep plans: ``Plan`` (a validated plan: cross-field validation with field paths, expansion into
points), ``load_plan`` and ``parse_plan``.

The file's pydantic model is ``labrun.plan_model``; point records, keys and grid arithmetic
``labrun.plan_expand``; stop conditions ``labrun.stops``; OSA auto-settings ``labrun.osa_auto``.
Their names stay importable from here.

A plan names a spool, fixed settings and axes (launched power, spacing, pump wavelength,
polarisation, attenuation), how the axes nest, repeat and interleave reference points, how the OSA
is set, and when to stop. ``load_plan`` validates everything before any instrument is touched;
every mistake becomes one ``InputError`` naming the file, the field path and the reason.
"""

from __future__ import annotations

import hashlib
import math
import random
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from pydantic import ValidationError

from labrun.errors import InputError
from labrun.inputfile import decode, parse_toml, read_bytes

# Moved by concern (issue 14); the names stay importable from labrun.plan.
from labrun.osa_auto import GAUSS_DB as GAUSS_DB
from labrun.osa_auto import POINT_STEPS as POINT_STEPS
from labrun.osa_auto import RBW_STEPS_NM as RBW_STEPS_NM
from labrun.osa_auto import OsaSettings, choose_osa_settings, estimate_sweep_s
from labrun.osa_auto import op_range as op_range
from labrun.osa_auto import op_settle as op_settle
from labrun.osa_auto import osa_sweep_model as osa_sweep_model
from labrun.osa_auto import sweep_model_s as sweep_model_s
from labrun.physics.units import nm_to_thz, thz_to_nm
from labrun.plan_expand import (
    ITU_ANCHOR_THZ,
    ITU_GRIDS_GHZ,
    Axis,
    PointSpec,
    interleave,
    is_number,
    itu_grid_thz,
    line_extent_nm,
    point_key,
    snake_order,
    spacing_nm_to_ghz,
    tidy,
    wavelength_b_nm,
)
from labrun.plan_expand import KEY_FIELDS as KEY_FIELDS
from labrun.plan_model import LINE_RANGE_NM as LINE_RANGE_NM
from labrun.plan_model import MAX_POINTS as MAX_POINTS
from labrun.plan_model import MAX_VALUES_PER_AXIS as MAX_VALUES_PER_AXIS
from labrun.plan_model import AxisSpec, PlanFile, StopSpec
from labrun.plan_model import MetaSpec as MetaSpec
from labrun.plan_model import OrderSpec as OrderSpec
from labrun.plan_model import OsaSpec as OsaSpec
from labrun.plan_model import SpoolSpec as SpoolSpec
from labrun.resources import find_file
from labrun.stops import StopCondition, StopWatch

if TYPE_CHECKING:
    from labrun.bench import Bench

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

# ----------------------------------------------------------------------------- public records


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
        self.spool_info = self._spool_info(spec.spool)
        self.note = spec.plan.note
        self.orders = spec.plan.orders
        self.amplifier = spec.plan.amplifier
        self.tap_power = spec.plan.tap_power
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

    def _spool_info(self, spool: SpoolSpec) -> dict[str, Any]:
        """[spool]'s fields for the spool row, a given dispersion as the row's
        ``params["dispersion"]`` (the keys of spoolfits.GivenDispersion); a D needs its u; the
        length and loss standard uncertainties as ``params["length_u_km"]`` and
        ``params["loss_u_db_per_km"]``."""
        info = spool.known()
        d = {k: info.pop(k) for k in list(info) if k.startswith("dispersion_")}
        stated_u = {k: info.pop(k) for k in ("length_u_km", "loss_u_db_per_km") if k in info}
        if stated_u.get("length_u_km", 0.0) >= info.get("length_km", math.inf):
            raise _fail(self.file, "spool.length_u_km", "must be below length_km (a standard "
                        "uncertainty of the length, km)")
        if stated_u:  # Spool.params keys of spoolfits.LENGTH_U_KEY, LOSS_U_KEY
            info["params"] = dict(stated_u)
        if not d:
            return info
        if "dispersion_ps_per_nm_km" not in d:
            raise _fail(self.file, f"spool.{next(iter(d))}", "needs dispersion_ps_per_nm_km")
        if "dispersion_u_ps_per_nm_km" not in d:
            raise _fail(self.file, "spool.dispersion_u_ps_per_nm_km",
                        "required with dispersion_ps_per_nm_km: its standard uncertainty, "
                        "ps/(nm km), a row of gamma's uncertainty budget")
        info["params"] = {**info.get("params", {}), "dispersion": {
            "d_ps_per_nm_km": d["dispersion_ps_per_nm_km"],
            "u_ps_per_nm_km": d["dispersion_u_ps_per_nm_km"],
            "slope_ps_per_nm2_km": d.get("dispersion_slope_ps_per_nm2_km", 0.0),
            "slope_u_ps_per_nm2_km": d.get("dispersion_slope_u_ps_per_nm2_km", 0.0),
            "reference_wavelength_nm": d.get("dispersion_at_nm", 1550.0)}}
        return info

    # -- fixed and axes

    def _validate_fixed(self, fixed: Mapping[str, Any]) -> dict[str, Any]:
        """Check each fixed setting's name, type and sanity range."""
        out: dict[str, Any] = {}
        for name, value in fixed.items():
            path = f"fixed.{name}"
            if name == "grid_ghz":
                if not is_number(value) or float(value) not in ITU_GRIDS_GHZ:
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
                    or not all(is_number(v) for v in value)):
                raise _fail(self.file, path, "must be a list of three numbers")
            vals = tuple(tidy(float(v)) for v in value)
            if any(not lo <= v <= hi for v in vals):
                raise _fail(self.file, path, f"each component must lie in [{lo:g}, {hi:g}]")
            if kind == "stokes" and abs(math.sqrt(sum(v * v for v in vals)) - 1.0) > 1e-3:
                raise _fail(self.file, path, "Stokes vector (s1, s2, s3) must have unit length")
            return vals
        if not is_number(value):
            raise _fail(self.file, path, "must be a number")
        v = float(value)
        if kind == "int":
            if v != int(v):
                raise _fail(self.file, path, "must be a whole number")
            v = int(v)
        if not lo <= v <= hi:
            raise _fail(self.file, path, f"{value} {unit} is outside the sane range "
                        f"[{lo:g}, {hi:g}] {unit}")
        return tidy(v) if isinstance(v, float) else v

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
        return tuple(tidy(v) + 0.0 for v in vec)  # type: ignore[return-value]

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
        return [tidy(float(v)) for v in raw]

    def _plain_number(self, value: Any, path: str) -> float:
        """A bare number (used for paddle angles and great-circle angles)."""
        if not is_number(value):
            raise _fail(self.file, path, "must be a number")
        return tidy(float(value))

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
        return list(snake_order(sizes) if self.spec.order.snake else np.ndindex(*sizes))

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
            seq = interleave(regular, ref, order.reference_every)
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
        out: dict[str, Any] = {"wavelength_a_nm": tidy(wl), "spacing_ghz": tidy(sp),
                               "wavelength_b_nm": tidy(wavelength_b_nm(wl, sp))}
        if "total_power_dbm" in v:
            r = v["ratio_db"]
            pa = v["total_power_dbm"] - 10.0 * math.log10(1.0 + 10.0 ** (r / 10.0))
            out["power_a_dbm"], out["power_b_dbm"] = tidy(pa), tidy(pa + r)
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

    def osa_settings(self, bench: Bench | None = None) -> OsaSettings:
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


__all__ = [
    "ITU_ANCHOR_THZ", "ITU_GRIDS_GHZ", "Axis", "OsaSettings", "Plan", "PointSpec",
    "StopCondition", "StopWatch", "choose_osa_settings", "estimate_sweep_s", "itu_grid_thz",
    "line_extent_nm", "load_plan", "parse_plan", "point_key", "spacing_nm_to_ghz",
    "wavelength_b_nm",
]
