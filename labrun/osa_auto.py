"""OSA auto-settings: the centre, span, RBW and sample count a plan needs (``choose_osa_settings``,
each choice with its reason), read from the bench OSA profile's ranges and sweep-time model, with
the generic OSA profile where the bench has none."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

from labrun.plan_expand import line_extent_nm
from labrun.profiles import generic_profile

if TYPE_CHECKING:
    from labrun.bench import Bench
    from labrun.plan import Plan
    from labrun.profiles import Operation, SweepTime

# RBW values a grating OSA offers, 1-2-5 sequence in nm (common practice).
RBW_STEPS_NM = (0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0)
# dB per (d/FWHM)^2 of a Gaussian filter: 10 log10(e) * 4 ln 2 (mathematical fact).
GAUSS_DB = 10.0 * math.log10(math.e) * 4.0 * math.log(2.0)
# Sample counts labrun offers (its own choice): odd, so a sample lands on the centre, and 2^n + 1,
# so each step halves the sample spacing of the one before and keeps every earlier sample.
POINT_STEPS = tuple(2**n + 1 for n in range(5, 19))  # 33 ... 262145


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


def estimate_sweep_s(span_nm: float, rbw_nm: float, points: int) -> float:
    """Rough grating-OSA sweep time: 0.2 s overhead + 0.1 ms per sample (from memory, rough)."""
    del span_nm, rbw_nm  # a finer RBW needs no more time per sample at normal sensitivity
    return round(0.2 + 1e-4 * points, 3)


def osa_sweep_model(bench: Bench | None) -> SweepTime | None:
    """The bench OSA's sweep-time model: as measured by ``labrun probe --sweep-time`` (the
    bench's ``[instruments.osa.sweep_time]``), else its profile's ``[trace.sweep_time]``, or
    None."""
    spec = bench.instruments.get("osa") if bench is not None else None
    if spec is not None and spec.sweep_time is not None:
        return spec.sweep_time
    trace = spec.profile.trace if spec is not None else None
    return trace.sweep_time if trace is not None else None


def sweep_model_s(bench: Bench | None, span_nm: float, rbw_nm: float, points: int) -> float:
    """Seconds per sweep: the bench OSA profile's model when it has one, else the rough guess."""
    model = osa_sweep_model(bench)
    if model is not None:
        return round(float(model.seconds(span_nm, rbw_nm, points)), 4)
    return estimate_sweep_s(span_nm, rbw_nm, points)


# ----------------------------------------------------------------------------- OSA choice


def op_range(bench: Bench | None, role: str, op: str) -> tuple[float, float] | None:
    """Allowed value range of a profile operation on the bench, or None if unknown."""
    operation = _operation(bench, role, op)
    rng = operation.range if operation is not None else None
    return (float(rng[0]), float(rng[1])) if rng else None


def _operation(bench: Bench | None, role: str, op: str) -> Operation | None:
    """The profile operation ``op`` of the bench's ``role``, or None (no bench, role or op)."""
    spec = bench.instruments.get(role) if bench is not None else None
    return spec.profile.operations.get(op) if spec is not None else None


def _osa_range(bench: Bench | None, op: str) -> tuple[float, float]:
    """The bench OSA's range for ``op``; without one (no bench, or the profile maps no such
    setting), the generic OSA profile's."""
    rng = op_range(bench, "osa", op) or generic_profile("osa").op(op).range
    assert rng is not None  # the generic profile ranges every setting (profiles refuse less)
    return (float(rng[0]), float(rng[1]))


def op_settle(bench: Bench | None, role: str, op: str) -> float:
    """Settle time of a profile operation (0 when unknown)."""
    operation = _operation(bench, role, op)
    return float(operation.settle_s or 0.0) if operation is not None else 0.0


def choose_osa_settings(plan: Plan, bench: Bench | None = None) -> OsaSettings:
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
