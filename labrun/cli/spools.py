"""``labrun spools`` (list spools with their latest fitted values) and ``labrun spool set``."""

from __future__ import annotations

import argparse
import json
from typing import Any

from labrun.store import DEFAULT_DB

# What ``spools`` and ``compare`` show of a fit, in order: (column, fit parameter names in order
# of preference). Gamma from the dual-frequency Bessel fit when there is one.
# (the gamma names are compare.GAMMA's, written out: `--help` must not import the store)
HEADLINE = (("gamma_per_w_per_km", ("gamma", "gamma_bessel", "gamma_small_signal")),
            ("dispersion_ps_per_nm_km", ("dispersion",)),
            ("dispersion_slope_ps_per_nm2_km", ("dispersion_slope",)))


def _db_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", default=DEFAULT_DB, metavar="URL_OR_PATH",
                   help=f"SQLAlchemy URL or SQLite file path (default: {DEFAULT_DB} here)")


def register(subparsers: Any) -> None:
    """Add the spools and spool commands."""
    p = subparsers.add_parser(
        "spools", help="list spools with their headline fitted values",
        description="Every spool in the store: length, loss, fibre type, runs, and the values "
                    "of its headline fit: the newest fit whose gamma claims an expanded "
                    "uncertainty and whose D was measured (a spacing run in the fit), else the "
                    "newest whose gamma claims one (D given on the spool record), else the "
                    "newest fit. Newer fits not shown are named, with why (without U, or with a "
                    "given D); labrun compare LABEL lists them all.")
    _db_arg(p)
    p.add_argument("--json", action="store_true", help="print JSON on stdout")
    p.set_defaults(func=cmd_spools)

    sp = subparsers.add_parser("spool", help="edit a spool's record",
                               description="Edit what is recorded of a spool.")
    sub = sp.add_subparsers(dest="spool_command", metavar="ACTION", required=True,
                            parser_class=type(sp))
    st = sub.add_parser("set", help="set a spool's length, loss (and their uncertainties), "
                                    "fibre type, note or known dispersion",
                        description="Set fields of a spool's record (created when new). "
                                    "Later fits use the new length and loss, their "
                                    "standard uncertainties (see --length-u-km) and the "
                                    "dispersion given here (see --dispersion).")
    st.add_argument("label", metavar="LABEL", help="spool label")
    st.add_argument("--length-km", type=float, metavar="KM")
    st.add_argument("--loss-db-per-km", type=float, metavar="DB")
    st.add_argument("--fibre-type", metavar="TEXT")
    st.add_argument("--note", metavar="TEXT")
    st.add_argument("--dispersion", type=float, metavar="PS_NM_KM",
                    help="the spool's chromatic dispersion D in ps/(nm km) as the lab knows it "
                         "without a spacing run (data sheet, another measurement), signed: "
                         "D > 0 anomalous. labrun fit uses it for the phase-mismatch correction "
                         "of gamma when the fitted runs include no spacing run (a spacing run "
                         "measures D and wins; a disagreement is warned), and its uncertainty "
                         "becomes a row of gamma's GUM budget. Without any D a power run alone "
                         "gives gamma with no expanded uncertainty. Needs --dispersion-u")
    st.add_argument("--dispersion-u", type=float, metavar="PS_NM_KM",
                    help="standard uncertainty (1 sigma) of --dispersion, ps/(nm km), > 0")
    st.add_argument("--dispersion-slope", type=float, metavar="PS_NM2_KM",
                    help="dispersion slope dD/d(lambda) in ps/(nm^2 km) at --dispersion-at-nm "
                         "(default 0)")
    st.add_argument("--dispersion-slope-u", type=float, metavar="PS_NM2_KM",
                    help="standard uncertainty of --dispersion-slope (default 0: no budget row)")
    st.add_argument("--dispersion-at-nm", type=float, metavar="NM",
                    help="wavelength at which --dispersion and the slope hold (default 1550)")
    st.add_argument("--forget-dispersion", action="store_true",
                    help="remove the recorded dispersion")
    st.add_argument("--length-u-km", type=float, metavar="KM",
                    help="standard uncertainty (1 sigma) of the length, absolute, in km "
                         "(e.g. 0.002 for an OTDR-measured length), > 0 and below the length. "
                         "labrun fit uses it for the 'spool length' row of the GUM budget "
                         "(shown there relative to the length); "
                         "without it the fit uses 0.5 %% of the length (common practice for a "
                         "length read off the reel) and the row says '(default)'")
    st.add_argument("--loss-u-db-per-km", type=float, metavar="DB",
                    help="standard uncertainty (1 sigma) of the loss, absolute, in dB/km "
                         "(e.g. 0.005 for a cut-back measurement), > 0 and at most 10. labrun "
                         "fit uses it for the 'spool loss' row of the GUM budget; without it "
                         "0.02 dB/km (common practice for a data-sheet loss), row '(default)'")
    st.add_argument("--forget-spool-u", action="store_true",
                    help="remove the stated length and loss uncertainties (fits use the "
                         "defaults again)")
    _db_arg(st)
    st.add_argument("--json", action="store_true", help="print the spool as JSON")
    st.set_defaults(func=cmd_spool_set)


def headline(record: Any) -> dict[str, Any]:
    """The headline parameters of a fit (see HEADLINE), each with its runs; D and its slope
    with ``sign_determined`` (D signed when the fit determined its sign, else |D|, as labrun fit
    shows it)."""
    from labrun.compare import sign_determined

    out: dict[str, Any] = {}
    if record is None:
        return out
    for column, names in HEADLINE:
        for name in names:
            p = record.parameters.get(name)
            if p is not None and p.value is not None:
                out[column] = {**p.to_dict(), "parameter": name, "runs": record.run_ids,
                               "fit_id": record.fit_id, "u95_kind": p.u95_kind()}
                if name.startswith("dispersion"):
                    signed = sign_determined(p)
                    out[column]["sign_determined"] = signed
                    if name == "dispersion" and not signed:
                        out[column]["value"] = abs(p.value)
                break
    return out


def spool_rows(store: Any) -> list[dict[str, Any]]:
    """One dict per spool: its record, run count, newest fit id, and the headline values from
    the fit ``labrun.compare.headline_fit`` picks (HEADLINE_RULE), with the newer fits it
    outranks (``newer_fits_not_shown``)."""
    from sqlalchemy import func, select

    from labrun.compare import HEADLINE_RULE, headline_fit
    from labrun.spoolfits import DISPERSION_KEY, fits_by_spool, stated_spool_u
    from labrun.store.models import Run, Spool

    fits = fits_by_spool(store)
    with store.session() as s:
        counts = dict(s.execute(select(Run.spool_id, func.count(Run.id))
                                .group_by(Run.spool_id)).all())
        spools = s.scalars(select(Spool).order_by(Spool.label)).all()
    rows = []
    for sp in spools:
        history = fits.get(sp.label, [])
        latest = history[-1] if history else None
        shown, newer = headline_fit(history)
        rows.append({"spool": sp.label, "length_km": sp.length_km,
                     "loss_db_per_km": sp.loss_db_per_km, "fibre_type": sp.fibre_type,
                     "note": sp.note, "runs": int(counts.get(sp.id, 0)),
                     "dispersion_record": (sp.params or {}).get(DISPERSION_KEY),
                     "stated_u": stated_spool_u(sp),
                     "latest_fit": latest.fit_id if latest else None,
                     "fitted_at": latest.created_at.isoformat() if latest and latest.created_at
                     else None,
                     "headline_fit": shown.fit_id if shown else None,
                     "headline_fitted_at": shown.created_at.isoformat()
                     if shown and shown.created_at else None,
                     "headline_rule": HEADLINE_RULE,
                     "newer_fits_not_shown": newer,
                     **headline(shown)})
    return rows


def newer_note(row: dict[str, Any]) -> str | None:
    """'newer fit 3 without U not shown; labrun compare LABEL', or None."""
    newer = row.get("newer_fits_not_shown") or []
    if not newer:
        return None
    said = ", ".join(f"fit {n['fit_id']} {n['why']}" for n in newer)
    return (f"{row['spool']}: newer {said} not shown (headline fit {row['headline_fit']}); "
            f"labrun compare {row['spool']}")


def _short(p: dict[str, Any] | None) -> str:
    """'12.5 (U k=2 0.28)': a headline value with its uncertainty labelled as labrun fit and
    labrun compare label it (the statistical error only where there is no U); a D whose sign
    the fit did not determine is shown as '|D| 4.6 (...)'."""
    from labrun.spoolfits import u_label

    if not p:
        return "-"
    if p.get("comparable") is False:
        return f"{p['value']:.4g} [no U]"
    name = "|D| " if p.get("parameter") == "dispersion" and p.get("sign_determined") is False \
        else ""
    if p.get("u95") is not None:
        return f"{name}{p['value']:.4g} ({u_label(p.get('u95_kind'))} {p['u95']:.2g})"
    err = f" (u stat {p['stderr']:.2g})" if p.get("stderr") is not None else ""
    return f"{name}{p['value']:.4g}{err}"


def _d_cell(row: dict[str, Any]) -> str:
    """The fitted D, else the given D the headline fit used ('2.69 (given, u 0.05)'), else the
    D on the spool's record ('2.69 (record, u 0.05)')."""
    rec = row.get("dispersion_record")
    used = (row.get("gamma_per_w_per_km") or {}).get("dispersion_used")
    if not row.get("dispersion_ps_per_nm_km") and used and used.get("d_ps_per_nm_km") is not None:
        return f"{used['d_ps_per_nm_km']:.4g} (given, u {used['u_ps_per_nm_km']:.2g})"
    if row.get("dispersion_ps_per_nm_km") or not rec:
        return _short(row.get("dispersion_ps_per_nm_km"))
    return f"{rec['d_ps_per_nm_km']:.4g} (record, u {rec['u_ps_per_nm_km']:.2g})"


def cmd_spools(args: argparse.Namespace) -> int:
    """labrun spools: the spools table."""
    from labrun.store import open_existing_store

    store = open_existing_store(args.db)
    try:
        rows = spool_rows(store)
    finally:
        store.close()
    if args.json:
        print(json.dumps({"spools": rows}, indent=2))
        return 0
    if not rows:
        print("no spools recorded yet")
        return 0
    print(f"{'spool':<12} {'km':>7} {'dB/km':>6} {'runs':>4} {'fit':>4}  "
          f"{'gamma 1/(W km)':<22} {'D ps/(nm km)':<26} type")
    for r in rows:
        print(f"{r['spool']:<12} {_opt(r['length_km']):>7} {_opt(r['loss_db_per_km']):>6} "
              f"{r['runs']:>4} {r['headline_fit'] or '-':>4}  "
              f"{_short(r.get('gamma_per_w_per_km')):<22} "
              f"{_d_cell(r):<26} {r['fibre_type'] or ''}")
    from labrun.compare import HEADLINE_RULE
    from labrun.spoolfits import U_LEGEND

    for r in rows:
        note = newer_note(r)
        if note:
            print(note)
    print(f"(fit: the headline fit, {HEADLINE_RULE})")
    print(f"{U_LEGEND}; u stat: statistical standard error only; |D|: the fit did not "
          "determine the sign of D")
    if any(r.get("gamma_per_w_per_km", {}).get("comparable") is False for r in rows):
        from labrun.spoolfits import NO_U_HINT, NO_U_LEGEND

        print(f"[no U]: {NO_U_LEGEND} ({NO_U_HINT})")
    return 0


def _opt(v: float | None) -> str:
    return "-" if v is None else f"{v:g}"


def cmd_spool_set(args: argparse.Namespace) -> int:
    """labrun spool set LABEL ...: edit (or create) a spool record."""
    from sqlalchemy import select

    from labrun.errors import InputError
    from labrun.spoolfits import DISPERSION_KEY, LENGTH_U_KEY, LOSS_U_KEY, GivenDispersion
    from labrun.store import open_existing_store
    from labrun.store.models import Spool, utcnow

    fields = {"length_km": args.length_km, "loss_db_per_km": args.loss_db_per_km,
              "fibre_type": args.fibre_type, "note": args.note}
    given = {k: v for k, v in fields.items() if v is not None}
    dispersion = _dispersion_arg(args)
    spool_u = _spool_u_args(args)
    if not given and dispersion is None and not args.forget_dispersion and not spool_u \
            and not args.forget_spool_u:
        raise InputError("nothing to set: give --length-km, --loss-db-per-km, --length-u-km, "
                         "--loss-u-db-per-km, --fibre-type, --note, --dispersion or a --forget "
                         "option", field="LABEL")
    for name, low, high in (("length_km", 0.0, 1.0e5), ("loss_db_per_km", 0.0, 100.0)):
        v = given.get(name)
        if v is not None and not (low < v <= high if name == "length_km" else low <= v <= high):
            raise InputError(f"must be within {low:g}..{high:g}",
                             field="--" + name.replace("_", "-"))
    store = open_existing_store(args.db, upgrade=True)
    try:
        _check_length_u(store, args.label, given.get("length_km"), spool_u, args.forget_spool_u)
        store.spool_id(args.label)
        with store.session() as s:
            spool = s.scalar(select(Spool).where(Spool.label == args.label))
            if spool is None:  # spool_id above made it
                raise InputError(f"no spool {args.label!r}", field="LABEL")
            for name, value in given.items():
                setattr(spool, name, value)
            params = dict(spool.params or {})
            if dispersion is not None or args.forget_dispersion:
                params.pop(DISPERSION_KEY, None)
            if dispersion is not None:
                params[DISPERSION_KEY] = dispersion.to_params()
            if args.forget_spool_u:
                params.pop(LENGTH_U_KEY, None)
                params.pop(LOSS_U_KEY, None)
            params.update(spool_u)
            if params != (spool.params or {}):
                spool.params = params  # a new dict: the JSON column sees the change
            rec = GivenDispersion.of(spool)
            spool.updated_at = utcnow()
            out = {"spool": spool.label, "length_km": spool.length_km,
                   "loss_db_per_km": spool.loss_db_per_km, "fibre_type": spool.fibre_type,
                   "note": spool.note, **_u_out(spool),
                   "dispersion": (spool.params or {}).get(DISPERSION_KEY)}
    finally:
        store.close()
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"spool {out['spool']}: " + ", ".join(
            f"{k} = {v}" for k, v in out.items()
            if k not in ("spool", "dispersion", "length_u_from", "loss_u_from")
            and v is not None)
            + (f", dispersion {rec.text()} (used by labrun fit without a spacing run)"
               if rec else ""))
    return 0


LOSS_U_MAX_DB_PER_KM = 10.0  # a loss u above 10 dB/km is a typo (common practice)


def _u_out(spool: Any) -> dict[str, Any]:
    """The record's length and loss u as ``spool set --json`` shows them (None: the fit's
    default, named in ``*_u_from``)."""
    from labrun.spoolfits import LENGTH_U_KEY, LOSS_U_KEY, stated_spool_u

    stated = stated_spool_u(spool)
    return {LENGTH_U_KEY: stated.get(LENGTH_U_KEY),
            "length_u_from": "spool record" if LENGTH_U_KEY in stated else "default (0.5 %)",
            LOSS_U_KEY: stated.get(LOSS_U_KEY),
            "loss_u_from": "spool record" if LOSS_U_KEY in stated else "default (0.02 dB/km)"}


def _spool_u_args(args: argparse.Namespace) -> dict[str, float]:
    """--length-u-km and --loss-u-db-per-km as Spool.params entries; InputError naming the
    option for a value that is not a positive finite number (the length bound is checked
    against the record, _check_length_u)."""
    import math

    from labrun.errors import InputError
    from labrun.spoolfits import LENGTH_U_KEY, LOSS_U_KEY

    out: dict[str, float] = {}
    for option, key, value, high in (("--length-u-km", LENGTH_U_KEY, args.length_u_km, None),
                                     ("--loss-u-db-per-km", LOSS_U_KEY, args.loss_u_db_per_km,
                                      LOSS_U_MAX_DB_PER_KM)):
        if value is None:
            continue
        if args.forget_spool_u:
            raise InputError(f"give either {option} or --forget-spool-u", field="--forget-spool-u")
        if not (math.isfinite(value) and value > 0.0 and (high is None or value <= high)):
            bound = f" and at most {high:g}" if high is not None else ""
            raise InputError(f"must be a standard uncertainty above 0{bound} (got {value:g})",
                             field=option)
        out[key] = value
    return out


def _check_length_u(store: Any, label: str, length_km: float | None,
                    spool_u: dict[str, float], forget: bool) -> None:
    """InputError unless the length u the record will hold is below the length it will hold
    (checked before the record is touched)."""
    from sqlalchemy import select

    from labrun.errors import InputError
    from labrun.spoolfits import LENGTH_U_KEY, stated_spool_u
    from labrun.store.models import Spool

    with store.session() as s:
        spool = s.scalar(select(Spool).where(Spool.label == label))
        old_length = spool.length_km if spool is not None else None
        old_u = None if spool is None or forget else stated_spool_u(spool).get(LENGTH_U_KEY)
    u = spool_u.get(LENGTH_U_KEY, old_u)
    length = length_km if length_km is not None else old_length
    if u is None:
        return
    option = "--length-u-km" if LENGTH_U_KEY in spool_u else "--length-km"
    if length is None:
        raise InputError(f"spool {label} has no length on record: give --length-km with it",
                         field=option)
    if u >= length:
        raise InputError(f"the length's standard uncertainty {u:g} km must be below the length "
                         f"{length:g} km", field=option)


DISPERSION_LIMITS = (("--dispersion", 300.0), ("--dispersion-u", 100.0),
                     ("--dispersion-slope", 5.0), ("--dispersion-slope-u", 5.0))
# |D| <= 300 ps/(nm km) and |S| <= 5 ps/(nm^2 km) hold typos out and every fibre in (transmission,
# highly nonlinear and dispersion-compensating fibre are well inside; common practice)


def _dispersion_arg(args: argparse.Namespace) -> Any:
    """The --dispersion options as a GivenDispersion (None without --dispersion); InputError
    naming the option for a missing uncertainty or a value out of range."""
    import math

    from labrun.errors import InputError
    from labrun.spoolfits import GivenDispersion

    others = {"--dispersion-u": args.dispersion_u, "--dispersion-slope": args.dispersion_slope,
              "--dispersion-slope-u": args.dispersion_slope_u,
              "--dispersion-at-nm": args.dispersion_at_nm}
    if args.dispersion is None:
        stray = next((k for k, v in others.items() if v is not None), None)
        if stray:
            raise InputError("needs --dispersion in the same command", field=stray)
        return None
    if args.forget_dispersion:
        raise InputError("give either --dispersion or --forget-dispersion",
                         field="--forget-dispersion")
    if args.dispersion_u is None:
        raise InputError("needs --dispersion-u, the standard uncertainty of the given D "
                         "(ps/(nm km)): it becomes a row of gamma's uncertainty budget",
                         field="--dispersion-u")
    values = {"--dispersion": args.dispersion, **others}
    for name, limit in DISPERSION_LIMITS:
        v = values[name]
        if v is None:
            continue
        low = 0.0 if name.endswith("-u") else -limit
        if not math.isfinite(v) or not low <= v <= limit or (name == "--dispersion-u" and v == 0):
            what = f"within {low:g}..{limit:g}" + (", not 0" if name == "--dispersion-u" else "")
            raise InputError(f"must be {what}", field=name)
    at = args.dispersion_at_nm
    if at is not None and not (math.isfinite(at) and 1000.0 <= at <= 2000.0):
        raise InputError("must be within 1000..2000 nm", field="--dispersion-at-nm")
    return GivenDispersion(args.dispersion, args.dispersion_u, args.dispersion_slope or 0.0,
                           args.dispersion_slope_u or 0.0, at or 1550.0)
