"""Laser safety for plans: worst-case launched power, caps, advisory hazard class, cautions.

Everything here is computed from the plan and the bench file alone, before any instrument is
opened. ``instrument_settings`` and ``worst_case`` share one rule for the laser level, so the worst
case shown to the operator is the worst case of what the engine will actually command: each laser
sits at a fixed level (the plan's ``laser_x_dbm`` if given, else its bench cap clipped to the
profile range) and the attenuators set the launched power (DEVELOPERS.md, "Bench files").
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

from labrun.errors import SafetyError
from labrun.plan import Plan, PointSpec, op_range, wavelength_b_nm
from labrun.roles import SWEEP_ROLES
from labrun.setpoints import profile_settings, targets

if TYPE_CHECKING:
    from labrun.bench import Bench

ARMS = ("a", "b")

CAUTIONS = """\
LASER SAFETY (advisory; local rules and your site's laser safety officer take precedence)
- The sources on this bench can be IEC 60825-1 class 3B or class 4: they can injure eyes and skin.
- The beam at 1.3-1.6 um is invisible infrared: you cannot see it and you will not blink at it.
- Never look into a fibre end, a connector or an adapter, with or without optics, even if you
  believe the sources are off.
- Cap every unused connector and fibre end; switch sources off before (dis)connecting anything.
- Wear safety eyewear rated for the wavelengths and powers in use (optical density at 1.3-1.6 um).
- Follow your local rules and defer to the site's laser safety officer; labrun's hazard class is
  advisory only and does not replace a classification by a competent person.
"""

# Accessible emission limits for CW sources at 1400-1700 nm, long exposure, in mW.
# From memory, advisory only; consult IEC 60825-1 and your laser safety officer.
CLASS_1_MW = 10.0  # Class 1 AEL, 1400-4000 nm, exposures over 10 s (from memory)
CLASS_3R_MW = 5.0 * CLASS_1_MW  # Class 3R: up to 5 x the Class 1 AEL (from memory)
CLASS_3B_MW = 500.0  # Class 3B: up to 0.5 W for CW (from memory)
HAZARD_BAND_NM = (1300.0, 1700.0)
HAZARD_NOTE = (
    "Advisory hazard class for CW emission at 1.3-1.7 um using limits from memory (Class 1 "
    "<= 10 mW, 3R <= 50 mW, 3B <= 500 mW, 4 above); advisory only: consult IEC 60825-1 and your "
    "laser safety officer. Class 1M/2M depend on beam geometry and are not assessed; below "
    "1400 nm the Class 1 limit varies with wavelength and the 10 mW value is less certain."
)


# ----------------------------------------------------------------------------- records


@dataclass(frozen=True)
class Violation:
    """A reason to refuse the plan on this bench; ``str()`` is the one-line message."""

    kind: str  # "cap" (a power cap), "range" (a profile range), "bench" (a missing role)
    message: str
    role: str | None = None
    field: str | None = None
    value: float | None = None
    limit: float | None = None
    point: int | None = None

    def __str__(self) -> str:
        return self.message

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly form."""
        return asdict(self)


@dataclass(frozen=True)
class InstrumentSettings:
    """What to command for one setpoint: laser levels, attenuations, amplifier output."""

    wavelength_a_nm: float
    wavelength_b_nm: float
    laser_a_dbm: float
    laser_b_dbm: float
    attenuation_a_db: float
    attenuation_b_db: float
    amplifier_dbm: float | None
    launched_a_dbm: float
    launched_b_dbm: float


@dataclass(frozen=True)
class WorstCase:
    """Worst-case launched power per path and in total, and the highest power on the bench.

    ``path_dbm``: launched into the spool if an attenuator fell to its minimum while its laser
    sits at the plan's highest level (with an amplifier: its whole output in one tone).
    ``planned_dbm``: the highest launched power the plan itself asks for.
    """

    path_dbm: dict[str, float]
    total_dbm: float
    planned_dbm: dict[str, float]
    source_dbm: dict[str, float]
    highest_dbm: float
    wavelength_nm: float
    amplifier: bool
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def max_launched_dbm(self) -> dict[str, float]:
        """Per path and total worst case, rounded for display and JSON."""
        out = {arm: round(v, 2) for arm, v in self.path_dbm.items()}
        out["total"] = round(self.total_dbm, 2)
        return out

    @property
    def hazard_class(self) -> str:
        """Advisory class of the highest power present on the bench."""
        return hazard_class(self.highest_dbm, self.wavelength_nm)

    def describe(self) -> str:
        """One line for the operator."""
        paths = ", ".join(f"path {a} {v:.2f} dBm" for a, v in self.path_dbm.items())
        srcs = ", ".join(f"{r} {v:.2f} dBm" for r, v in self.source_dbm.items())
        return (f"{paths}, total {self.total_dbm:.2f} dBm ({_mw(self.total_dbm):.1f} mW) into "
                f"the spool; sources at {srcs}; highest on the bench {self.highest_dbm:.2f} dBm")

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly form."""
        return {
            "max_launched_dbm": self.max_launched_dbm,
            "planned_dbm": {k: round(v, 2) for k, v in self.planned_dbm.items()},
            "source_dbm": {k: round(v, 2) for k, v in self.source_dbm.items()},
            "highest_dbm": round(self.highest_dbm, 2),
            "wavelength_nm": round(self.wavelength_nm, 3),
            "amplifier": self.amplifier,
            "notes": list(self.notes),
        }


# ----------------------------------------------------------------------------- helpers


def _mw(dbm: float) -> float:
    """dBm -> mW (common practice)."""
    return 10.0 ** (dbm / 10.0)


def _dbm(mw: float) -> float:
    """mW -> dBm; -inf for zero."""
    return 10.0 * math.log10(mw) if mw > 0 else -math.inf


def _cap(bench: Bench, role: str) -> float | None:
    """The bench's hard cap of a source, or None."""
    spec = bench.instruments.get(role)
    return None if spec is None or spec.max_power_dbm is None else float(spec.max_power_dbm)


def _loss(bench: Bench, arm: str) -> float:
    """Path loss laser -> spool input of one arm, attenuator at 0 dB (calibration)."""
    return float(getattr(bench.calibration, f"path_loss_{arm}_db", 0.0) or 0.0)


def _amp_loss(bench: Bench) -> float:
    """Loss amplifier output -> spool input (calibration)."""
    return float(getattr(bench.calibration, "amplifier_loss_db", 0.0) or 0.0)


def _amp_output_dbm(setpoint: Mapping[str, Any], bench: Bench) -> float:
    """Amplifier output that launches the setpoint's two tones: their total plus the loss."""
    return _dbm(_mw(setpoint["power_a_dbm"]) + _mw(setpoint["power_b_dbm"])) + _amp_loss(bench)


def _amp_setting(setpoint: Mapping[str, Any], bench: Bench) -> float:
    """The amplifier output the engine commands for a setpoint (to 1 mdB)."""
    return round(_amp_output_dbm(setpoint, bench), 3)


def _att_range(bench: Bench, arm: str) -> tuple[float, float]:
    """Attenuation range of an arm's attenuator (0..60 dB when the profile says nothing)."""
    return op_range(bench, f"attenuator_{arm}", "set_attenuation_db") or (0.0, 60.0)


def default_laser_dbm(bench: Bench, role: str) -> float:
    """Fixed laser level when the plan pins none: the bench cap clipped to the profile range."""
    cap = _cap(bench, role)
    rng = op_range(bench, role, "set_power_dbm")
    levels = [v for v in (cap, rng[1] if rng else None) if v is not None]
    if not levels:
        raise SafetyError(f"{role}: no power cap in the bench and no range in its profile")
    return min(levels)


def laser_level(setpoint: Mapping[str, Any], bench: Bench, arm: str,
                laser_dbm: Mapping[str, float] | None = None) -> float:
    """Laser level of one arm for a setpoint: override, the plan's laser_x_dbm, or the default."""
    role = f"laser_{arm}"
    if laser_dbm and role in laser_dbm:
        return float(laser_dbm[role])
    if setpoint.get(f"laser_{arm}_dbm") is not None:
        return float(setpoint[f"laser_{arm}_dbm"])
    return default_laser_dbm(bench, role)


def _round_att(att: float) -> float:
    """Attenuation to 1 mdB (the profiles' resolution), rounded up: never more light."""
    return math.ceil(att * 1000.0 - 1e-6) / 1000.0


# ----------------------------------------------------------------------------- settings


def instrument_settings(setpoint: Mapping[str, Any], bench: Bench, *,
                        laser_dbm: Mapping[str, float] | None = None) -> InstrumentSettings:
    """Laser levels, attenuations and amplifier output that realise a setpoint's launched powers.

    Lasers stay at a fixed level and the attenuators do the work. Raises SafetyError when a value
    would leave a cap or a profile range (check_caps reports the same before a run).
    """
    wl_a = float(setpoint["wavelength_a_nm"])
    wl_b = float(setpoint.get("wavelength_b_nm") or wavelength_b_nm(wl_a, setpoint["spacing_ghz"]))
    levels = {arm: laser_level(setpoint, bench, arm, laser_dbm) for arm in ARMS}
    for arm in ARMS:
        _check_level(bench, f"laser_{arm}", levels[arm])
    if setpoint.get("amplifier"):
        atts, amp, launched = _amplified(setpoint, bench, levels)
    else:
        atts, launched = {}, {}
        for arm in ARMS:
            atts[arm], launched[arm] = _arm(setpoint, bench, arm, levels[arm])
        amp = None
    return InstrumentSettings(
        wavelength_a_nm=wl_a, wavelength_b_nm=wl_b, laser_a_dbm=levels["a"],
        laser_b_dbm=levels["b"], attenuation_a_db=atts["a"], attenuation_b_db=atts["b"],
        amplifier_dbm=amp, launched_a_dbm=launched["a"], launched_b_dbm=launched["b"])


def _check_level(bench: Bench, role: str, level: float) -> None:
    """Refuse a source level above its cap or outside its profile range."""
    cap = _cap(bench, role)
    if cap is not None and level > cap + 1e-9:
        raise SafetyError(f"{role}: {level:.2f} dBm is above the bench cap {cap:.2f} dBm")
    rng = op_range(bench, role, "set_power_dbm")
    if rng and not rng[0] - 1e-9 <= level <= rng[1] + 1e-9:
        raise SafetyError(f"{role}: {level:.2f} dBm is outside the profile range "
                          f"[{rng[0]:g}, {rng[1]:g}] dBm")


def _arm(setpoint: Mapping[str, Any], bench: Bench, arm: str, level: float) -> tuple[float, float]:
    """(attenuation, launched power) of one arm without an amplifier."""
    loss = _loss(bench, arm)
    lo, hi = _att_range(bench, arm)
    if setpoint.get(f"attenuation_{arm}_db") is not None:
        att = float(setpoint[f"attenuation_{arm}_db"])
    else:
        want = float(setpoint[f"power_{arm}_dbm"])
        att = _round_att(level - want - loss)
        if att < lo - 1e-9:
            raise SafetyError(f"tone {arm}: {want:.2f} dBm launched needs laser_{arm} at "
                              f"{want + loss + lo:.2f} dBm, above its level {level:.2f} dBm "
                              f"(cap or plan)")
    if not lo - 1e-9 <= att <= hi + 1e-9:
        raise SafetyError(f"tone {arm}: attenuation {att:.2f} dB is outside attenuator_{arm}'s "
                          f"range [{lo:g}, {hi:g}] dB")
    return att, level - att - loss


def _amplified(setpoint: Mapping[str, Any], bench: Bench,
               levels: Mapping[str, float]) -> tuple[dict[str, float], float, dict[str, float]]:
    """Attenuations (set the tone ratio into the amplifier) and amplifier output (the total)."""
    pa, pb = float(setpoint["power_a_dbm"]), float(setpoint["power_b_dbm"])
    amp = _amp_setting(setpoint, bench)
    _check_level(bench, "amplifier", amp)
    # Highest input each arm can give (attenuator at its minimum); weaken one to set the ratio.
    top = {a: levels[a] - _att_range(bench, a)[0] - _loss(bench, a) for a in ARMS}
    excess = (top["b"] - top["a"]) - (pb - pa)
    atts = {a: _att_range(bench, a)[0] for a in ARMS}
    atts["b" if excess > 0 else "a"] += abs(excess)
    for arm in ARMS:
        atts[arm] = _round_att(atts[arm])
        lo, hi = _att_range(bench, arm)
        if atts[arm] > hi + 1e-9:
            raise SafetyError(f"tone {arm}: attenuation {atts[arm]:.2f} dB for the tone ratio is "
                              f"above attenuator_{arm}'s maximum {hi:g} dB")
    return atts, amp, {"a": pa, "b": pb}


# ----------------------------------------------------------------------------- worst case


def worst_case(plan: Plan, bench: Bench, *,
               laser_dbm: Mapping[str, float] | None = None) -> WorstCase:
    """Worst-case launched power per path and in total over every point, after calibration.

    Without an amplifier: max laser level - minimum attenuation - path loss, per arm (the case of
    an attenuator failing to its minimum). With one: its highest output - amplifier_loss_db,
    which a single tone could carry if the other laser dropped out.
    """
    pts = plan.points()
    amp_used = bool(getattr(plan, "amplifier", False))
    levels = {arm: max(laser_level(p.setpoint, bench, arm, laser_dbm) for p in pts)
              for arm in ARMS}
    planned = {arm: max(_planned(p.setpoint, bench, arm, laser_dbm) for p in pts) for arm in ARMS}
    planned["total"] = max(_dbm(sum(_mw(_planned(p.setpoint, bench, a, laser_dbm)) for a in ARMS))
                           for p in pts)
    sources = {f"laser_{arm}": levels[arm] for arm in ARMS}
    notes = []
    if amp_used:
        amp_loss = _amp_loss(bench)
        amp_max = max(_amp_output_dbm(p.setpoint, bench) for p in pts)
        sources["amplifier"] = amp_max
        path = {arm: amp_max - amp_loss for arm in ARMS}
        total = amp_max - amp_loss
        notes.append("amplifier: its whole output could sit in one tone if a laser drops out")
    else:
        path = {arm: levels[arm] - _att_range(bench, arm)[0] - _loss(bench, arm) for arm in ARMS}
        total = _dbm(sum(_mw(v) for v in path.values()))
        notes.append("per path: the laser at its level with the attenuator at its minimum")
    wavelengths = [p.setpoint[k] for p in pts for k in ("wavelength_a_nm", "wavelength_b_nm")]
    return WorstCase(path_dbm=path, total_dbm=total, planned_dbm=planned, source_dbm=sources,
                     highest_dbm=max([total, *sources.values()]),
                     wavelength_nm=min(wavelengths), amplifier=amp_used, notes=tuple(notes))


def _planned(setpoint: Mapping[str, Any], bench: Bench, arm: str,
             laser_dbm: Mapping[str, float] | None) -> float:
    """Launched power the plan asks for on one arm (from attenuation when the plan sets it)."""
    if setpoint.get(f"power_{arm}_dbm") is not None:
        return float(setpoint[f"power_{arm}_dbm"])
    level = laser_level(setpoint, bench, arm, laser_dbm)
    return level - float(setpoint[f"attenuation_{arm}_db"]) - _loss(bench, arm)


# ----------------------------------------------------------------------------- caps


def check_caps(plan: Plan, bench: Bench, *,
               laser_dbm: Mapping[str, float] | None = None) -> list[Violation]:
    """Every reason to refuse this plan on this bench: caps, profile ranges, missing roles."""
    out: list[Violation] = []
    missing = [r for r in SWEEP_ROLES if r not in bench.instruments]
    if getattr(plan, "amplifier", False) and "amplifier" not in bench.instruments:
        missing.append("amplifier")
    if getattr(plan, "capture_input", False) and "switch" not in bench.instruments:
        missing.append("switch")
    for role in missing:
        out.append(Violation("bench", f"the bench has no {role}, which this plan needs",
                             role=role, field="instruments"))
    if missing:
        return out
    pts = plan.points()
    seen: set[tuple[str, str | None, str | None]] = set()

    def add(v: Violation) -> None:
        """Keep the first offending point of each kind/role/field."""
        tag = (v.kind, v.role, v.field)
        if tag not in seen:
            seen.add(tag)
            out.append(v)

    amp = bool(getattr(plan, "amplifier", False))
    for p in pts:
        for v in _point_violations(p, bench, laser_dbm, amplifier=amp):
            add(v)
    if not any(v.kind == "cap" and v.field == "max_power_dbm" for v in out):
        wc = worst_case(plan, bench, laser_dbm=laser_dbm)
        cap = float(bench.max_total_launched_dbm)
        if wc.total_dbm > cap + 1e-9:
            add(Violation("cap", f"worst-case total launched power {wc.total_dbm:.2f} dBm "
                          f"exceeds the bench cap max_total_launched_dbm = {cap:.2f} dBm",
                          field="max_total_launched_dbm", value=round(wc.total_dbm, 3),
                          limit=cap))
    for v in _osa_violations(plan, bench):
        add(v)
    return out


def _point_violations(p: PointSpec, bench: Bench, laser_dbm: Mapping[str, float] | None, *,
                      amplifier: bool) -> Iterable[Violation]:
    """Caps and ranges broken by one point; ``amplifier`` is the plan's flag (plan.amplifier),
    so the amplifier set-point is checked whatever the setpoint itself carries. The ranges are
    checked on the settings the engine will command (``labrun.setpoints``, the run's mapping)."""
    sp = {**p.setpoint, "amplifier": amplifier}
    levels = {arm: laser_level(sp, bench, arm, laser_dbm) for arm in ARMS}
    for arm in ARMS:
        role, level = f"laser_{arm}", levels[arm]
        cap = _cap(bench, role)
        if cap is not None and level > cap + 1e-9:
            yield Violation("cap", f"{role}: level {level:.2f} dBm exceeds its bench cap "
                            f"{cap:.2f} dBm (point {p.index})", role=role, field="max_power_dbm",
                            value=level, limit=cap, point=p.index)
    # Without instrument_settings' answer (it refuses the point) the lasers' levels and the
    # amplifier output are still checked against their ranges; the attenuations are not known.
    commanded: dict[str, Any] = {**sp, "laser_a_dbm": levels["a"], "laser_b_dbm": levels["b"],
                                 "attenuation_a_db": None, "attenuation_b_db": None,
                                 "amplifier_dbm": None}
    amp_capped = False
    if amplifier:
        amp = _amp_output_dbm(sp, bench)
        cap = _cap(bench, "amplifier")
        if cap is not None and amp > cap + 1e-9:
            amp_capped = True
            yield Violation("cap", f"amplifier: output {amp:.2f} dBm exceeds its bench cap "
                            f"{cap:.2f} dBm (point {p.index})", role="amplifier",
                            field="max_power_dbm", value=round(amp, 3), limit=cap,
                            point=p.index)
        commanded["amplifier_dbm"] = _amp_setting(sp, bench)
    try:
        commanded.update(asdict(instrument_settings(sp, bench, laser_dbm=laser_dbm)))
    except SafetyError as exc:
        # an amplifier failure after amp_capped is the same cap, reported above with its role
        if not (amp_capped and str(exc).startswith("amplifier:")):
            kind = "cap" if "cap" in str(exc) else "range"
            yield Violation(kind, f"{exc} (point {p.index})", role="attenuator",
                            field="launched_power", point=p.index)
    for target in targets(commanded, bench.instruments):
        for one in profile_settings(target.method, target.value):
            yield from _range(bench, target.role, one.op, one.value, p.index, label=one.label)


def _range(bench: Bench, role: str, op: str, value: float, point: int | None,
           unit: str | None = None, label: str | None = None) -> Iterable[Violation]:
    """A Violation when ``value`` lies outside the profile range of ``op`` on ``role`` (in
    ``unit``, by default the operation's own)."""
    rng = op_range(bench, role, op)
    spec = bench.instruments.get(role)
    if rng is None or spec is not None and op not in spec.profile.operations:
        return
    if unit is None:
        unit = (spec.profile.operations[op].unit if spec is not None else None) or ""
    if not rng[0] - 1e-9 <= value <= rng[1] + 1e-9:
        what = f"{role} {label or op}"
        at = f" (point {point})" if point is not None else ""
        yield Violation("range", f"{what}: {value:g} {unit} is outside the profile range "
                        f"[{rng[0]:g}, {rng[1]:g}] {unit}{at}".replace("  ", " "),
                        role=role, field=op, value=value, limit=rng[1] if value > rng[1]
                        else rng[0], point=point)


def _osa_violations(plan: Plan, bench: Bench) -> Iterable[Violation]:
    """OSA settings outside the OSA profile's ranges (centre, span, RBW, points)."""
    osa = plan.osa_settings(bench)
    centers = {osa.for_point(p.setpoint).center_nm for p in plan.points()}
    for c in sorted(centers):
        yield from _range(bench, "osa", "set_center_nm", c, None, "nm")
    yield from _range(bench, "osa", "set_span_nm", osa.span_nm, None, "nm")
    yield from _range(bench, "osa", "set_rbw_nm", osa.rbw_nm, None, "nm")
    yield from _range(bench, "osa", "set_points", osa.points, None, "")


# ----------------------------------------------------------------------------- hazard class


def hazard_class(power_dbm: float, wavelength_nm: float) -> str:
    """Advisory IEC 60825-1 class of a CW source at 1.3-1.7 um from its power alone.

    Limits from memory, advisory only; consult IEC 60825-1 and your laser safety officer.
    """
    lo, hi = HAZARD_BAND_NM
    if not lo <= wavelength_nm <= hi:
        return f"not assessed (outside {lo:g}-{hi:g} nm)"
    mw = _mw(power_dbm)
    if mw <= CLASS_1_MW:
        return "Class 1"
    if mw <= CLASS_3R_MW:
        return "Class 3R"
    if mw <= CLASS_3B_MW:
        return "Class 3B"
    return "Class 4"


__all__ = [
    "CAUTIONS", "HAZARD_NOTE", "InstrumentSettings", "Violation", "WorstCase", "check_caps",
    "default_laser_dbm", "hazard_class", "instrument_settings", "laser_level", "worst_case",
]
