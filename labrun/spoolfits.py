"""Fits of a spool's stored runs: gather the runs' points, fit them together, store the result.

``fit_runs`` reads the points of one or more runs of ONE spool (a spacing run supplies the
dispersion a power run lacks), fits them with ``_fit_tables`` (the one place that names the fit
model of ``labrun.fits``), adds the 95 % expanded uncertainty of each parameter and, unless told
not to, stores the fit (tables ``fits`` and ``fit_parameters``). ``latest_fits`` and
``fit_history`` read stored fits back for ``labrun spools`` and ``labrun compare``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import select

from labrun import __version__
from labrun.errors import InputError
from labrun.store import Store
from labrun.store.models import Fit, FitParameter, Run, Spool

FAR_APART_H = 24.0  # runs started further apart than this are taken to have their own
# launched-power errors (labrun's choice: a bench's launched power re-checked daily is common
# practice)
COVERAGE_P = 0.95  # expanded uncertainty coverage probability (GUM 6.2, 6.3)
GUM_K2 = "GUM expanded uncertainty U = 2 u_c (k = 2)"
STUDENT_T95 = "Student t 95 % half-width of the statistical standard error (no budget)"
U_LEGEND = ("U k=2: the GUM budget's expanded uncertainty 2 u_c; U95 t: Student t 95 % "
            "half-width of the statistical error alone (no budget)")


NO_U_LEGEND = ("no expanded uncertainty is claimed: the dispersion is unknown (a power run alone, "
               "no D on record), and so is gamma's phase-mismatch correction, or gamma depends "
               "non-linearly on the given D (near an efficiency null); not comparable, "
               "never flagged as changed")
NO_U_HINT = ("labrun spool set LABEL --dispersion D --dispersion-u U gives a D, or fit a spacing "
             "run with the power run")
DISPERSION_KEY = "dispersion"  # Spool.params entry of a dispersion the lab knows (spool set)
LENGTH_U_KEY = "length_u_km"  # Spool.params entries: the stated standard uncertainty of the
LOSS_U_KEY = "loss_u_db_per_km"  # length (km) and loss (dB/km) (spool set, plan [spool])
D_SOURCE = "dispersion D (spool record)"  # the budget row of a given D (28 columns)
S_SOURCE = "slope S (spool record)"


def u_label(kind: str | None) -> str:
    """How the commands print an expanded uncertainty of this kind ('U k=2' or 'U95 t')."""
    return "U k=2" if kind == GUM_K2 else "U95 t"


def no_u_label(extra: dict[str, Any]) -> str | None:
    """'no U: dispersion unknown' for a value that claims no uncertainty, else None."""
    reason = extra.get("no_u_reason")
    return f"no U: {str(reason).split(':')[0]}" if reason else None


METHOD = ("labrun.exactfit.fit_spool on the runs' points together (closed forms, then the "
          "split-step forward model with each arm's launched-power offset fitted), GUM budget "
          "from the bench calibration")


@dataclass
class ParameterRecord:
    """One fitted parameter as stored and reported (JSON keys of ``labrun fit --json``)."""

    value: float | None
    stderr: float | None
    u95: float | None
    unit: str
    model: str
    n_points: int
    residual_rms: float | None
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: value, stderr, u95, unit, model, n_points, residual_rms (and the GUM
        budget with u_combined, the fit's warnings and sign conventions when it has them)."""
        out: dict[str, Any] = {
            "value": self.value, "stderr": self.stderr, "u95": self.u95, "unit": self.unit,
            "model": self.model, "n_points": self.n_points, "residual_rms": self.residual_rms}
        out["u95_kind"] = self.u95_kind()
        if self.extra.get("no_u_reason"):
            out.update(comparable=False, u_combined=None, no_u_reason=self.extra["no_u_reason"],
                       no_u_hint=self.extra.get("no_u_hint"))
        if self.extra.get("dispersion_source") == GIVEN_SOURCE:
            out["dispersion_used"] = {
                "source": GIVEN_SOURCE, "d_ps_per_nm_km": self.extra.get(
                    "dispersion_used_ps_per_nm_km"),
                "u_ps_per_nm_km": self.extra.get("dispersion_used_u_ps_per_nm_km"),
                "slope_ps_per_nm2_km": self.extra.get("slope_used_ps_per_nm2_km"),
                "reference_wavelength_nm": self.extra.get("dispersion_reference_wavelength_nm")}
        for key in ("u_combined", "budget", "warnings", "conventions"):
            if self.extra.get(key):
                out[key] = self.extra[key]
        if self.extra.get("mc_n"):
            out["monte_carlo"] = {k: self.extra.get(f"mc_{k}") for k in
                                  ("n", "low", "high", "p", "mean", "std", "seed", "method")}
        return out

    def u95_kind(self) -> str | None:
        """What ``u95`` is: the GUM budget's expanded uncertainty (k = 2) or a Student-t
        interval half-width of the statistical error alone (no budget)."""
        if self.u95 is None:
            return None
        return GUM_K2 if self.extra.get("u_combined") is not None else STUDENT_T95


@dataclass
class FitRecord:
    """A fit of one spool's runs: parameters by name, and where they came from."""

    spool: str
    run_ids: list[int]
    parameters: dict[str, ParameterRecord]
    method: str = METHOD
    software_version: str = __version__
    fit_id: int | None = None
    created_at: datetime | None = None
    spool_snapshot: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: fit id, spool, runs, time, and every parameter keyed by its name."""
        return {"fit_id": self.fit_id, "spool": self.spool, "runs": self.run_ids,
                "created_at": self.created_at.isoformat() if self.created_at else None,
                "software_version": self.software_version, "method": self.method,
                "spool_properties": self.spool_snapshot,
                "parameters": {k: p.to_dict() for k, p in self.parameters.items()}}


def coverage_factor(dof: int, p: float = COVERAGE_P) -> float:
    """Student-t coverage factor t_p(dof) for an expanded uncertainty (GUM G.3, Table G.2)."""
    from scipy.stats import t

    return float(t.ppf(0.5 + p / 2.0, max(int(dof), 1)))


def expanded(stderr: float | None, n_points: int) -> float | None:
    """95 % expanded uncertainty U = t_95(n - 1) u; None without a finite standard error.

    Degrees of freedom n - 1 (one location-like parameter per fit); a fit that reports its own
    degrees of freedom in ``extra["dof"]`` is expected to be passed through ``from_fit`` instead.
    """
    if stderr is None or not math.isfinite(stderr) or n_points < 2:
        return None
    return coverage_factor(n_points - 1) * stderr


def _finite(v: Any) -> float | None:
    """float, or None for NaN/inf/None."""
    return float(v) if v is not None and math.isfinite(float(v)) else None


def from_fit(result: Any) -> ParameterRecord:
    """A ParameterRecord from a ``labrun.fits.FitResult`` (u95 from the fit when it has one)."""
    stderr = _finite(result.stderr)
    u95 = _finite(getattr(result, "u95", None))  # a GUM budget's U (k = 2) when it has one
    if u95 is None and not (result.extra or {}).get("no_u_reason"):
        dof = (result.extra or {}).get("dof")
        u95 = (coverage_factor(dof) * stderr if dof and stderr is not None
               else expanded(stderr, int(result.n_points)))
    extra: dict[str, Any] = {k: _finite(v) if isinstance(v, float) else v
             for k, v in (result.extra or {}).items()
             if isinstance(v, str | int | float | bool) or v is None}
    if getattr(result, "warnings", None):
        extra["warnings"] = [str(w) for w in result.warnings]
    if getattr(result, "conventions", ""):
        extra["conventions"] = str(result.conventions)
    if _finite(getattr(result, "u_combined", None)) is not None:
        extra["u_combined"] = _finite(result.u_combined)
        extra["budget"] = [{k: _finite(v) if isinstance(v, float) else v for k, v in row.items()}
                           for row in getattr(result, "budget", [])]
    return ParameterRecord(value=_finite(result.value), stderr=stderr, u95=_finite(u95),
                           unit=result.unit, model=result.model,
                           n_points=int(result.n_points),
                           residual_rms=_finite(result.residual_rms), extra=extra)


@dataclass(frozen=True)
class GivenDispersion:
    """A dispersion the lab knows of a spool without a spacing run (``labrun spool set
    --dispersion``), kept in ``Spool.params["dispersion"]``: D (signed, D > 0 anomalous) and its
    standard uncertainty, ps/(nm km); the slope (ps/(nm^2 km), with its own standard uncertainty,
    0 = taken as exact) at the reference wavelength (nm)."""

    d: float
    u: float
    slope: float = 0.0
    slope_u: float = 0.0
    wavelength_nm: float = 1550.0

    @classmethod
    def of(cls, spool: Any) -> GivenDispersion | None:
        """The spool record's given dispersion, or None when it has none."""
        rec = (getattr(spool, "params", None) or {}).get(DISPERSION_KEY)
        if not rec or rec.get("d_ps_per_nm_km") is None:
            return None
        return cls(float(rec["d_ps_per_nm_km"]), float(rec.get("u_ps_per_nm_km") or 0.0),
                   float(rec.get("slope_ps_per_nm2_km") or 0.0),
                   float(rec.get("slope_u_ps_per_nm2_km") or 0.0),
                   float(rec.get("reference_wavelength_nm") or 1550.0))

    def to_params(self) -> dict[str, float]:
        """What ``Spool.params["dispersion"]`` keeps."""
        return {"d_ps_per_nm_km": self.d, "u_ps_per_nm_km": self.u,
                "slope_ps_per_nm2_km": self.slope, "slope_u_ps_per_nm2_km": self.slope_u,
                "reference_wavelength_nm": self.wavelength_nm}

    def text(self) -> str:
        """'D = 2.69 +/- 0.05 ps/(nm km), slope 0.05 ps/(nm^2 km) at 1550 nm'."""
        slope = f"{self.slope:g}" + (f" +/- {self.slope_u:g}" if self.slope_u else "")
        return (f"D = {self.d:g} +/- {self.u:g} ps/(nm km), slope {slope} ps/(nm^2 km) at "
                f"{self.wavelength_nm:g} nm")


GIVEN_SOURCE = "spool record (labrun spool set)"


def given_text(extra: dict[str, Any]) -> str | None:
    """The line ``labrun fit`` prints under a gamma fitted with the spool record's D."""
    if extra.get("dispersion_source") != GIVEN_SOURCE:
        return None
    where = (f"its uncertainty is the budget row '{D_SOURCE}'" if not extra.get("no_u_reason")
             else "gamma's change over D +- 2u is not linear, so no budget row can carry it")
    return (f"D used: {extra.get('dispersion_given')} from the {GIVEN_SOURCE}, no spacing run "
            f"in the fit; {where}")


def stated_spool_u(spool: Any) -> dict[str, float]:
    """The standard uncertainties of length and loss the spool record states (keys
    LENGTH_U_KEY, LOSS_U_KEY; none: {})."""
    params = getattr(spool, "params", None) or {}
    return {k: float(params[k]) for k in (LENGTH_U_KEY, LOSS_U_KEY) if params.get(k) is not None}


def spool_u_terms(spool: Any) -> dict[str, float | str]:
    """Uncertainties' spool fields for a fit of this spool: its record's stated u's, else the
    defaults (labrun.uncertainty.spool_terms); InputError naming the record's field."""
    from labrun.uncertainty import spool_terms

    stated = stated_spool_u(spool)
    try:
        return spool_terms(spool.length_km, stated.get(LENGTH_U_KEY), stated.get(LOSS_U_KEY))
    except ValueError as e:
        raise InputError(f"spool {spool.label}: {e} (labrun spool set {spool.label} "
                         "--length-u-km / --loss-u-db-per-km)", field="spool") from None


def _n_spacings(tables: list[Any]) -> int:
    """Distinct spacings among the runs' points (>= 2: the fit measures the dispersion)."""
    import numpy as np

    values = [np.asarray(t["spacing_ghz"], float) for t in tables if "spacing_ghz" in t]
    if not values:
        return 0
    sp = np.concatenate(values)
    return int(np.unique(np.round(sp[np.isfinite(sp)], 6)).size)


def _fit_tables(tables: list[Any], spool: Spool, bench_text: str | None, *,
                monte_carlo: int = 0) -> dict[str, Any]:
    """Fit one spool's runs, one point table per run, with the exact-model joint fit
    (``labrun.exactfit.fit_spool``: closed forms first, then the split-step forward model) and the
    GUM budget of every parameter from the runs' bench calibration and polarisation frame.

    Dispersion: measured from the spacing dependence when the runs sweep the spacing (the spool
    record's D, when it has one, is then only checked against it); else the spool record's D
    (``GivenDispersion``), its uncertainty a budget row; else none, and the values the
    mismatch correction sets claim no uncertainty (exactfit.without_u)."""
    from labrun.exactfit import fit_spool, mismatch_null
    from labrun.fits import PolFrame
    from labrun.uncertainty import Uncertainties

    length_km, loss_db_per_km = spool.length_km, spool.loss_db_per_km
    if length_km is None or loss_db_per_km is None:  # refused by the caller before this
        raise ValueError(f"spool {spool.label} has no length or loss")
    cal, pol = _bench_terms(bench_text)
    kw: dict[str, Any] = {"polarisation": PolFrame.from_bench(pol),
                          "uncertainties": Uncertainties.from_calibration(
                              cal, **spool_u_terms(spool))}
    given = GivenDispersion.of(spool)
    notes: list[str] = []
    if given is None or _n_spacings(tables) >= 2:
        results = fit_spool(tables, length_km, loss_db_per_km, **kw, monte_carlo=monte_carlo)
        disp = results.get("dispersion")
        if given is None or (disp is not None and math.isfinite(disp.value)):
            return results if given is None else _checked_against(results, given)
        notes.append("the runs sweep the spacing but gave no dispersion (refused): the spool "
                     f"record's {given.text()} is used instead")

    def fit(d: float, s: float, mc: int = 0, budget: bool = True) -> dict[str, Any]:
        return fit_spool(tables, length_km, loss_db_per_km, dispersion_ps_per_nm_km=d,
                         slope_ps_per_nm2_km=s, reference_wavelength_nm=given.wavelength_nm,
                         **kw, monte_carlo=mc, budget=budget,
                         dispersion_u_ps_per_nm_km=given.u if mc else 0.0,
                         slope_u_ps_per_nm2_km=given.slope_u if mc else 0.0)

    results = fit(given.d, given.slope, monte_carlo)
    rows, scans = [], []
    for source, u, unit, step in ((D_SOURCE, given.u, "ps/(nm km)", (1.0, 0.0)),
                                  (S_SOURCE, given.slope_u, "ps/(nm^2 km)", (0.0, 1.0))):
        if u > 0:  # refits at the input moved by +u, -u, +2u, -2u (values only)
            moved = [fit(given.d + k * u * step[0], given.slope + k * u * step[1],
                         budget=False) for k in (1.0, -1.0, 2.0, -2.0)]
            rows.append((source, u, unit, moved[0], moved[1]))
            scans.append((source, [moved[3], moved[1], results, moved[0], moved[2]]))
    out = with_given_rows(results, rows, given, notes)
    null = mismatch_null(tables, length_km, loss_db_per_km, given.d, given.u, given.slope,
                         given.wavelength_nm)
    return given_linearity(out, scans, null)


def given_linearity(results: dict[str, Any], scans: list[tuple[str, list[Any]]],
                    null: dict[str, float] | None) -> dict[str, Any]:
    """The results with no U claimed for gamma (exactfit.without_u) where the given D's (or
    slope's) effect on it is not linear within its uncertainty: exactfit.nonlinearity of the
    exact gamma at input -2u..+2u above LINEARITY_TOL, or the phase mismatch crossing an
    efficiency null within D +- 2u (exactfit.mismatch_null). Then the budget's half-difference
    row would not bound gamma's error (near a null gamma(D) peaks between the refits). The
    scan's range and ratio stay in the extras (``given_scan_low``/``_high``,
    ``given_nonlinearity``)."""
    from dataclasses import replace

    from labrun.exactfit import (
        LINEARITY_TOL,
        MISMATCH_DEPENDENT,
        NONLINEAR_D_HINT,
        NONLINEAR_D_REASON,
        nonlinearity,
        without_u,
    )

    key = "gamma" if "gamma" in results else "gamma_small_signal"
    ratio, low, high, worst = 0.0, math.inf, -math.inf, ""
    for source, fits in scans:
        vals = [f[key].value if key in f else float("nan") for f in fits]
        r = nonlinearity(vals)
        if r >= ratio:
            ratio, worst = r, source
        finite = [v for v in vals if math.isfinite(v)]
        if finite:
            low, high = min(low, *finite), max(high, *finite)
    if not scans:
        return results
    out = dict(results)
    for name in MISMATCH_DEPENDENT:
        if name in out:
            extra = {**out[name].extra, "given_nonlinearity": ratio,
                     "given_linearity_tol": LINEARITY_TOL}
            if math.isfinite(low):
                extra.update(given_scan_low=low, given_scan_high=high)
            if null:
                extra.update(given_mismatch_rad=null["mismatch_rad_max"],
                             given_null_rad=null["null_rad"])
            out[name] = replace(out[name], extra=extra)
    if ratio <= LINEARITY_TOL and null is None:
        return out
    what = []
    if ratio > LINEARITY_TOL:
        what.append("second-order to first-order ratio " + (
            "inf: gamma is not monotonic" if not math.isfinite(ratio) else f"{ratio:.2g}")
            + f" over the {worst} row's input +- 2u (limit {LINEARITY_TOL:g}, JCGM 100:2008 "
            "5.1.2)")
    if null is not None:
        what.append(f"|dbeta| L of the first sideband {null['mismatch_rad_max']:.3g} rad at "
                    f"the given D, and the efficiency null 2 pi x {null['null_order']:.0f} = "
                    f"{null['null_rad']:.3g} rad inside D +- 2u")
    span = (f"; over D +- 2u the exact gamma ranges {low:.4g} to {high:.4g}"
            if math.isfinite(low) else "")
    return without_u(out, f"{NONLINEAR_D_REASON}: {'; '.join(what)}{span}", NONLINEAR_D_HINT)


def with_given_rows(results: dict[str, Any], rows: list[tuple[str, float, str, Any, Any]],
                    given: GivenDispersion, notes: list[str]) -> dict[str, Any]:
    """The results fitted with a given dispersion, each budget gaining one row per given input:
    contribution half the change of the value between refits at input +u and -u (JCGM
    100:2008 5.1.3, as labrun.uncertainty does for the bench's inputs), combined again; the
    gamma results say which D was used and where it came from."""
    from dataclasses import replace

    from labrun.exactfit import MISMATCH_DEPENDENT
    from labrun.uncertainty import Component, combine

    out = dict(results)
    for name, r in results.items():
        if not math.isfinite(r.value):
            continue
        extra, warnings = dict(r.extra), [*r.warnings, *notes]
        if name in MISMATCH_DEPENDENT:
            extra.update(dispersion_source=GIVEN_SOURCE, dispersion_given=given.text(),
                         dispersion_used_ps_per_nm_km=given.d,
                         dispersion_used_u_ps_per_nm_km=given.u,
                         slope_used_ps_per_nm2_km=given.slope,
                         dispersion_reference_wavelength_nm=given.wavelength_nm)
        if not r.budget:
            out[name] = replace(r, extra=extra, warnings=warnings)
            continue
        comps = [Component(**row) for row in r.budget]
        for source, u, unit, up, down in rows:
            a, b = up.get(name), down.get(name)
            half = (abs(a.value - b.value) / 2.0 if a is not None and b is not None
                    else float("nan"))
            comps.append(Component(source, u, unit, half))
        u_c, u95 = combine(comps)
        out[name] = replace(r, extra=extra, warnings=warnings, u_combined=u_c, u95=u95,
                            budget=[c.to_dict() for c in comps])
    return out


def _checked_against(results: dict[str, Any], given: GivenDispersion) -> dict[str, Any]:
    """The spacing run's fit, warned when the spool record's D disagrees with the fitted D
    beyond their expanded uncertainties combined (sqrt(U1^2 + U2^2), U2 = 2 u of the record);
    |D| compared where the fit does not determine the sign."""
    from dataclasses import replace

    disp = results["dispersion"]
    signed = bool(disp.extra.get("sign_determined"))
    fitted = disp.value if signed else abs(disp.value)
    recorded = given.d if signed else abs(given.d)
    u_fit = disp.u95 if math.isfinite(disp.u95) else 0.0
    limit = math.hypot(u_fit, 2.0 * given.u)
    out = dict(results)
    out["dispersion"] = replace(disp, extra={**disp.extra, "dispersion_source": "fitted (spacing "
                                             "run)", "dispersion_recorded": given.text()})
    if abs(fitted - recorded) > limit:
        note = (f"the spool record's {given.text()} disagrees with the spacing run's "
                f"{'D' if signed else '|D|'} = {fitted:.4g} +/- {u_fit:.2g} (U) beyond their "
                f"expanded uncertainties combined ({limit:.2g}): the spacing run's is used; "
                "check the record (labrun spool set)")
        for name in ("dispersion", *[k for k in ("gamma",) if k in out]):
            out[name] = replace(out[name], warnings=[*out[name].warnings, note])
    return out


def _bench_terms(bench_text: str | None) -> tuple[Any, Any]:
    """The [calibration] and [polarisation] tables of a run's stored bench text (their
    documented defaults when the text has none: a run stored before they existed)."""
    import tomllib

    from labrun.bench import Calibration, Polarisation

    data: dict[str, Any] = {}
    if bench_text:
        try:
            data = tomllib.loads(bench_text)
        except tomllib.TOMLDecodeError:
            data = {}
    return (Calibration.model_validate(data.get("calibration", {})),
            Polarisation.model_validate(data.get("polarisation", {})))


@dataclass(frozen=True)
class RunOrigin:
    """Where and when a run was measured: what decides whether runs share launched-power errors."""

    run_id: int
    bench_name: str | None
    bench_text: str | None
    started_at: datetime | None


def shared_offset_warnings(origins: list[RunOrigin]) -> list[str]:
    """Warnings when the runs of one fit come from different benches or were started far apart.

    The exact fit carries ONE pair of launched-power offsets for all the runs and takes the
    first run's bench calibration as their prior; runs on different benches or days have
    independent launched-power errors, which that assumes away (said, not silent).
    """
    out: list[str] = []
    if len(origins) < 2:
        return out
    first = origins[0]
    names = {o.bench_name for o in origins}
    if len(names) > 1 or len({o.bench_text for o in origins}) > 1:
        what = ("benches " + ", ".join(repr(n) for n in sorted(names, key=str))
                if len(names) > 1 else f"bench {first.bench_name!r} with different bench files")
        out.append(f"runs {', '.join(str(o.run_id) for o in origins)} come from {what}: one "
                   "pair of launched-power offsets is fitted for all of them, with run "
                   f"{first.run_id}'s calibration as prior, though each bench's launched-power "
                   "errors are its own (fit each bench's runs apart to check)")
    times = sorted((o.started_at, o.run_id) for o in origins if o.started_at is not None)
    if len(times) >= 2:
        span_h = (times[-1][0] - times[0][0]).total_seconds() / 3600.0
        if span_h > FAR_APART_H:
            out.append(f"runs {times[0][1]} and {times[-1][1]} were started {span_h / 24:.1f} "
                       f"days apart (more than {FAR_APART_H:g} h): one pair of launched-power "
                       "offsets is fitted for all the runs, though launched-power errors on "
                       "different days are independent")
    return out


def _with_warnings(results: dict[str, Any], notes: list[str]) -> dict[str, Any]:
    """The fitted results with ``notes`` added to the exact ones and the power offsets (to every
    fitted result when there is no exact one)."""
    from dataclasses import replace

    import numpy as np

    if not notes:
        return results
    fitted = [k for k, r in results.items() if np.isfinite(r.value)]
    exact = [k for k in ("gamma", "dispersion", "dispersion_slope", "power_offset_a",
                         "power_offset_b") if k in fitted]
    out = dict(results)
    for k in exact or fitted:
        out[k] = replace(results[k], warnings=[*results[k].warnings, *notes])
    return out


def _spool_of(store: Store, run_ids: list[int]) -> tuple[Spool, str | None, list[RunOrigin]]:
    """The one spool the runs were measured on, the first run's stored bench text and each
    run's origin (InputError: unknown run, mixed or no spool)."""
    with store.session() as s:
        runs = {r.id: r for r in s.scalars(select(Run).where(Run.id.in_(run_ids)))}
        missing = [r for r in run_ids if r not in runs]
        if missing:
            raise InputError(f"no run {missing[0]} in this database", field="RUN_ID")
        spool_ids = {runs[r].spool_id for r in run_ids}
        if None in spool_ids:
            bad = next(r for r in run_ids if runs[r].spool_id is None)
            raise InputError(f"run {bad} is not linked to a spool (stored by labrun 0.1.0?); "
                             "fit it with Python (labrun.fits) instead", field="RUN_ID")
        if len(spool_ids) > 1:
            labels = sorted({owner.label for r in run_ids if (owner := runs[r].spool)})
            raise InputError(f"the runs are of different spools ({', '.join(labels)}): fit one "
                             "spool at a time", field="RUN_ID")
        spool_id = spool_ids.pop()
        spool = s.get(Spool, spool_id)
        if spool is None:  # the foreign key makes this impossible
            raise InputError(f"no spool {spool_id} in this database", field="RUN_ID")
        bench_text = runs[run_ids[0]].bench_text
        origins = [RunOrigin(r, runs[r].bench_name, runs[r].bench_text,
                             runs[r].started_at or runs[r].created_at) for r in run_ids]
    return spool, bench_text, origins


def fit_runs(store: Store, run_ids: list[int], *, save: bool = True,
             monte_carlo: int = 0) -> FitRecord:
    """Fit the runs of one spool together; stores the fit unless ``save`` is False.
    ``monte_carlo`` = M > 0: a JCGM 101 propagation with M trials beside the GUM budget."""

    from labrun.queries import run_points

    run_ids = list(dict.fromkeys(int(r) for r in run_ids))
    spool, bench_text, origins = _spool_of(store, run_ids)
    if spool.length_km is None or spool.loss_db_per_km is None:
        raise InputError(f"spool {spool.label} has no length or loss on record: "
                         f"labrun spool set {spool.label} --length-km KM --loss-db-per-km DB",
                         field="spool")
    tables = [run_points(store, r, include_reference=False, limits=True,
                          measured_spacing=True).assign(run_id=r)
              for r in run_ids]
    tables = [t for t in tables if not t.empty]
    if not tables:
        raise InputError("the runs have no stored points to fit", field="RUN_ID")
    results = _fit_tables(tables, spool, bench_text, monte_carlo=monte_carlo)
    results = _with_warnings(results, shared_offset_warnings(origins))
    params = {name: from_fit(r) for name, r in results.items()}
    _add_no_u_hints(params, store, spool, run_ids)
    record = FitRecord(spool=spool.label, run_ids=run_ids, parameters=params,
                       spool_snapshot={"length_km": spool.length_km,
                                       "loss_db_per_km": spool.loss_db_per_km,
                                       "fibre_type": spool.fibre_type,
                                       **stated_spool_u(spool)})
    if save:
        store_fit(store, spool.id, record)
    return record


SPACING_RUNS_LOOKED_AT = 20  # the newest runs of the spool searched for a spacing sweep


def _add_no_u_hints(params: dict[str, ParameterRecord], store: Store, spool: Spool,
                    run_ids: list[int]) -> None:
    """Each parameter that claims no U gets the hint what to do: fit the spool's spacing runs
    jointly when the store has some (one query), else, for an unknown D, give the D."""
    from labrun.exactfit import NO_D_HINT, NO_D_REASON

    no_u = [p for p in params.values() if p.extra.get("no_u_reason")]
    if not no_u:
        return
    others = spacing_runs(store, spool.id, run_ids)
    for p in no_u:
        no_d = str(p.extra["no_u_reason"]).startswith(NO_D_REASON)
        if others:
            tail = (f"give the D: labrun spool set {spool.label} --dispersion D "
                    "--dispersion-u U" if no_d else "measure at a smaller spacing")
            p.extra["no_u_hint"] = (
                f"run{'s' if len(others) > 1 else ''} {', '.join(map(str, others))} of "
                f"{spool.label} sweep{'' if len(others) > 1 else 's'} the spacing: labrun fit "
                f"{' '.join(map(str, [*run_ids, *others]))} fits them jointly (or {tail})")
        elif no_d:
            p.extra["no_u_hint"] = NO_D_HINT.replace("LABEL", spool.label)


def spacing_runs(store: Store, spool_id: int, exclude: list[int]) -> list[int]:
    """Runs of the spool, other than ``exclude``, whose points sweep the spacing (>= 2 set
    spacings): what a power run fitted alone lacks (newest first, a few at most)."""
    from labrun.queries import run_points

    with store.session() as s:
        ids = s.scalars(select(Run.id).where(Run.spool_id == spool_id, Run.id.not_in(exclude))
                        .order_by(Run.id.desc()).limit(SPACING_RUNS_LOOKED_AT)).all()
    found = []
    for run_id in ids:
        t = run_points(store, run_id, include_reference=False)
        if "spacing_ghz" in t and _n_spacings([t]) >= 2:
            found.append(int(run_id))
    return found[:3]


def store_fit(store: Store, spool_id: int, record: FitRecord) -> int:
    """Write a fit and its parameters in one transaction; sets and returns ``record.fit_id``."""
    with store.session() as s:
        fit = Fit(spool_id=spool_id, run_ids=record.run_ids, method=record.method,
                  software_version=record.software_version,
                  spool_snapshot=record.spool_snapshot)
        fit.parameters = [FitParameter(name=name, **vars(p)) for name, p in
                          record.parameters.items()]
        s.add(fit)
        s.flush()
        record.fit_id, record.created_at = fit.id, fit.created_at
    return int(record.fit_id)


def _record(fit: Fit, label: str) -> FitRecord:
    """A FitRecord from a stored fit row (parameters loaded)."""
    params = {p.name: ParameterRecord(value=p.value, stderr=p.stderr, u95=p.u95, unit=p.unit,
                                      model=p.model, n_points=p.n_points,
                                      residual_rms=p.residual_rms, extra=p.extra or {})
              for p in fit.parameters}
    return FitRecord(spool=label, run_ids=list(fit.run_ids), parameters=params,
                     method=fit.method, software_version=fit.software_version, fit_id=fit.id,
                     created_at=fit.created_at, spool_snapshot=fit.spool_snapshot or {})


def fit_history(store: Store, label: str) -> list[FitRecord]:
    """Every stored fit of a spool, oldest first (InputError for an unknown label)."""
    from sqlalchemy.orm import selectinload

    with store.session() as s:
        spool = s.scalar(select(Spool).where(Spool.label == label))
        if spool is None:
            raise InputError(f"no spool {label!r} in this database", field="LABEL")
        fits = s.scalars(select(Fit).where(Fit.spool_id == spool.id)
                         .options(selectinload(Fit.parameters)).order_by(Fit.id)).all()
        return [_record(f, label) for f in fits]


def latest_fits(store: Store) -> dict[str, FitRecord]:
    """The newest stored fit of every spool that has one, by spool label."""
    from sqlalchemy import func
    from sqlalchemy.orm import selectinload

    with store.session() as s:
        newest = select(func.max(Fit.id)).group_by(Fit.spool_id).scalar_subquery()
        rows = s.execute(select(Fit, Spool.label).join(Spool, Spool.id == Fit.spool_id)
                         .where(Fit.id.in_(newest)).options(selectinload(Fit.parameters))).all()
        return {label: _record(fit, label) for fit, label in rows}


def fits_using_run(store: Store, run_id: int) -> list[FitRecord]:
    """Stored fits whose runs include ``run_id``, oldest first (run lists are short JSON)."""
    from sqlalchemy.orm import selectinload

    with store.session() as s:
        rows = s.execute(select(Fit, Spool.label).join(Spool, Spool.id == Fit.spool_id)
                         .join(Run, Run.spool_id == Spool.id).where(Run.id == run_id)
                         .options(selectinload(Fit.parameters)).order_by(Fit.id)).all()
        return [_record(fit, label) for fit, label in rows if run_id in (fit.run_ids or [])]


def fits_by_spool(store: Store) -> dict[str, list[FitRecord]]:
    """Every stored fit of every spool that has one, oldest first, by spool label."""
    from sqlalchemy.orm import selectinload

    out: dict[str, list[FitRecord]] = {}
    with store.session() as s:
        rows = s.execute(select(Fit, Spool.label).join(Spool, Spool.id == Fit.spool_id)
                         .options(selectinload(Fit.parameters)).order_by(Fit.id)).all()
        for fit, label in rows:
            out.setdefault(label, []).append(_record(fit, label))
    return out
