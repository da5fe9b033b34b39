"""``labrun report``: one self-contained HTML page about a run or a spool (plots embedded).

A run's page: summary, spectra at chosen points with their lines labelled, sideband power
against launched power with the fitted slopes, efficiency against spacing with the fit (when the
spacing moved), polarisation dependence (when it moved), the event and fault timeline and the
fit table with uncertainties. A spool's page: its record, runs and fits over time. Every image
is a PNG in a data: URI, so the file can be mailed or archived alone.
"""

from __future__ import annotations

import base64
import html
import math
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from labrun.errors import InputError
from labrun.store import Store

CSS = """
body{font-family:system-ui,sans-serif;margin:2em auto;max-width:1100px;color:#222}
h1{font-size:1.5em}h2{font-size:1.15em;margin-top:1.6em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;font-size:.9em}td,th{border:1px solid #ccc;padding:.25em .6em}
th{background:#f2f2f2;text-align:left}td.n{text-align:right;font-variant-numeric:tabular-nums}
img{max-width:100%;border:1px solid #ddd;margin:.4em 0}.fault{color:#a40000}
.note{color:#555;font-size:.85em}
"""


def _e(value: Any) -> str:
    return html.escape("" if value is None else str(value))


def _num(value: Any, fmt: str = ".5g") -> str:
    return "-" if value is None or (isinstance(value, float) and not math.isfinite(value)) \
        else format(value, fmt)


def _img(path: Path, alt: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{_e(alt)}">'


def _table(head: list[str] | None, rows: list[list[str]]) -> str:
    """An HTML table; cells are already escaped/formatted strings."""
    th = "<tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>" if head else ""
    body = "".join("<tr>" + "".join(r) + "</tr>" for r in rows)
    return f"<table>{th}{body}</table>"


def _cell(text: str, numeric: bool = False) -> str:
    return f'<td class="n">{text}</td>' if numeric else f"<td>{text}</td>"


def _page(title: str, sections: list[str]) -> str:
    from labrun import __version__
    from labrun.spoolfits import U_LEGEND

    return (f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{_e(title)}</title><style>{CSS}</style></head><body>"
            f"<h1>{_e(title)}</h1>{''.join(sections)}"
            f"<p class=\"note\">Written by labrun {_e(__version__)}. Plots and values come from "
            f"the run store; uncertainties: u standard; U expanded, labelled by kind as "
            f"labrun fit labels it ({_e(U_LEGEND)}).</p>"
            f"</body></html>")


def _u_text(p: Any) -> str:
    """'U k=2 0.09' or 'U95 t 0.002': the expanded uncertainty labelled as labrun fit labels it."""
    from labrun.spoolfits import u_label

    return "-" if p.u95 is None else f"{u_label(p.u95_kind())} {_num(p.u95, '.2g')}"


FIT_HEAD = ["parameter", "value", "u", "U (kind)", "unit", "points", "model"]


def _fit_rows(record: Any) -> list[list[str]]:
    rows = []
    for name, p in record.parameters.items():
        why = next((w for w in p.extra.get("warnings", []) if w.startswith("refused")), "")
        model = p.model.split(":")[0] + (f" ({why})" if why else "")
        no_u = p.extra.get("no_u_reason")
        u95 = (f"no U ({_e(no_u)}; not comparable)" if no_u else _u_text(p))
        rows.append([_cell(_e(name)), _cell(_num(p.value), True),
                     _cell(_num(p.stderr, ".2g"), True), _cell(u95, not no_u),
                     _cell(_e(p.unit)), _cell(str(p.n_points), True), _cell(_e(model))])
    return rows


def _spectra(store: Store, table: Any, out: Path, orders: int) -> list[str]:
    """Spectra at the first, middle and last measured points, lines labelled."""
    from labrun.plots import plot_trace
    from labrun.queries import point_trace
    from labrun.reduce import reduce_trace

    measured = table[~table["is_reference"]] if not table.empty else table
    if measured.empty:
        return []
    picks = sorted({0, len(measured) // 2, len(measured) - 1})
    images = []
    for i in picks:
        row = measured.iloc[i]
        x, y, rbw = point_trace(store, int(row["point_id"]))
        red = reduce_trace(x, y, rbw or 0.02, orders=orders)
        title = (f"point {int(row['index'])}: {row.get('power_a_dbm', float('nan')):+.1f} / "
                 f"{row.get('power_b_dbm', float('nan')):+.1f} dBm, "
                 f"{row.get('spacing_ghz', float('nan')):.1f} GHz")
        images.append(_img(plot_trace(out / f"trace-{i}.png", x, y, red, title=title), title))
    return images


def _efficiency_plot(table: Any, fit: Any, spool: Any, out: Path) -> str | None:
    """First upper sideband over output pump tone against spacing, with the fitted model."""
    if "spacing_ghz" not in table or table["spacing_ghz"].nunique() < 2 or \
            "sideband_high_1" not in table or "tone_high_0" not in table:
        return None
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from labrun.compare import sign_determined
    from labrun.physics.fibre import Fibre
    from labrun.physics.fwm import small_signal_sideband_w
    from labrun.physics.units import dbm_to_w

    ratio = table["sideband_high_1"] - table["tone_high_0"]
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=110)
    ax.semilogx(table["spacing_ghz"], ratio, "o", ms=3.5, label="measured")
    gamma = next((fit.parameters[k] for k in ("gamma", "gamma_bessel", "gamma_small_signal")
                  if fit and k in fit.parameters and fit.parameters[k].value is not None), None)
    disp = fit.parameters.get("dispersion") if fit else None
    if gamma is not None and disp is not None and disp.value is not None and \
            spool.length_km and spool.loss_db_per_km is not None:
        slope = fit.parameters.get("dispersion_slope")
        fibre = Fibre(spool.length_km, spool.loss_db_per_km, gamma.value, disp.value,
                      slope.value if slope and slope.value is not None else 0.0)
        grid = np.geomspace(table["spacing_ghz"].min(), table["spacing_ghz"].max(), 300)
        lam = float(table["wavelength_a_nm"].median()) if "wavelength_a_nm" in table else 1550.0
        pa = float(dbm_to_w(table["power_a_dbm"].median()))
        pb = float(dbm_to_w(table["power_b_dbm"].median()))
        model = small_signal_sideband_w(fibre, pa, pb, lam, grid, "high") / \
            (pb * math.exp(-fibre.alpha_per_km * fibre.length_km))
        d_text = (f"D {disp.value:.3g}" if sign_determined(disp)
                  else f"|D| {abs(disp.value):.3g}")
        ax.semilogx(grid, 10 * np.log10(model), "-",
                    label=f"fit: {d_text} {disp.unit}, gamma {gamma.value:.3g}")
    ax.set_xlabel("tone spacing (GHz)")
    ax.set_ylabel("first upper sideband / pump tone (dB)")
    ax.set_title("FWM efficiency against spacing (Inoue small-signal model)", fontsize=9)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(out / "efficiency.png")
    plt.close(fig)
    return _img(out / "efficiency.png", "efficiency against spacing")


def _polarisation_plot(table: Any, out: Path) -> str | None:
    """First upper sideband against the angle between the tones' Stokes vectors."""
    col = "pol_stokes" if "pol_stokes" in table else None
    if col is None or "sideband_high_1" not in table:
        return None
    stokes = np.array([list(v) if isinstance(v, list | tuple) else [np.nan] * 3
                       for v in table[col]], dtype=float)
    angle = np.degrees(np.arccos(np.clip(stokes[:, 0], -1.0, 1.0)))
    if np.unique(np.round(angle[np.isfinite(angle)], 3)).size < 2:
        return None
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=110)
    ax.plot(angle, table["sideband_high_1"], "o", ms=3.5)
    ax.set_xlabel("angle between the tones on the Poincare sphere (deg)")
    ax.set_ylabel("first upper sideband (dBm)")
    ax.set_title("polarisation dependence", fontsize=9)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(out / "polarisation.png")
    plt.close(fig)
    return _img(out / "polarisation.png", "polarisation dependence")


def run_report(store: Store, run_id: int) -> str:
    """The HTML page of one run."""
    from labrun.plots import plot_power_slopes
    from labrun.queries import run_events, run_points
    from labrun.spoolfits import fit_runs, fits_using_run
    from labrun.store.models import Run

    with store.session() as s:
        run = s.get(Run, run_id)
        if run is None:
            raise InputError(f"no run {run_id} in this database", field="RUN_ID")
        spool = run.spool
        s.expunge_all()
    table = run_points(store, run_id)
    events = run_events(store, run_id)
    stored = fits_using_run(store, run_id)
    fit = stored[-1] if stored else None
    fit_note = f"stored fit {fit.fit_id} (runs {', '.join(map(str, fit.run_ids))})" if fit \
        else "fitted for this report, not stored"
    if fit is None and spool is not None and spool.length_km is not None and \
            spool.loss_db_per_km is not None and not table.empty:
        try:
            fit = fit_runs(store, [run_id], save=False)
        except (InputError, ValueError):
            fit = None
    done = len(table)
    summary = [
        ("status", f"{run.status}" + (f" ({run.reason})" if run.reason else "")),
        ("plan", f"{run.plan_name} ({run.plan_path})"), ("bench", run.bench_name),
        ("spool", "-" if spool is None else
         f"{spool.label}: {_num(spool.length_km, 'g')} km, "
         f"{_num(spool.loss_db_per_km, 'g')} dB/km, {spool.fibre_type or 'type not recorded'}"),
        ("points", f"{done} stored of {run.points_total}"),
        ("operator", f"{run.operator}{' (unattended)' if run.unattended else ''}"),
        ("started", run.started_at), ("finished", run.finished_at),
        ("software", f"labrun {run.software_version} on {run.host}"),
    ]
    sections = ["<h2>Summary</h2>" + _table(None, [[f"<th>{_e(k)}</th>", _cell(_e(v))]
                                                   for k, v in summary])]
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        orders = int(table.filter(like="sideband_high_").shape[1]) or 3
        images = _spectra(store, table, out, orders)
        if images:
            sections.append("<h2>Spectra</h2>" + "".join(images))
        measured = table[~table["is_reference"]] if not table.empty else table
        if not measured.empty and {"power_a_dbm", "power_b_dbm"} <= set(measured.columns) and \
                (measured["power_a_dbm"].nunique() > 1 or measured["power_b_dbm"].nunique() > 1):
            slopes = {k: p for k, p in (fit.parameters.items() if fit else [])
                      if k.startswith("slope_") and p.value is not None and p.stderr is not None}
            sections.append("<h2>Sideband power against launched power</h2>" + _img(
                plot_power_slopes(out / "slopes.png", measured, slopes), "power slopes"))
        eff = _efficiency_plot(measured, fit, spool, out) if spool is not None else None
        if eff:
            sections.append("<h2>Efficiency against spacing</h2>" + eff)
        pol = _polarisation_plot(measured, out)
        if pol:
            sections.append("<h2>Polarisation dependence</h2>" + pol)
    rows = [[_cell(_e(str(e.at)[:19])), _cell(_e(e.kind)), _cell(_e(e.role or "")),
             _cell(_e(e.message))] for e in events.itertuples()]
    faults = int((events["kind"] == "fault").sum()) if not events.empty else 0
    sections.append(f"<h2>Events and faults ({len(events)} events, {faults} faults)</h2>" +
                    _table(["time (UTC)", "kind", "role", "message"], rows).replace(
                        "<td>fault</td>", '<td class="fault">fault</td>'))
    if fit is not None:
        sections.append(f"<h2>Fits</h2><p class=\"note\">{_e(fit_note)}</p>" + _table(
            FIT_HEAD, _fit_rows(fit)))
    return _page(f"labrun run {run_id}: {run.plan_name}", sections)


def spool_report(store: Store, label: str) -> str:
    """The HTML page of one spool: record, runs, fits over time."""
    from labrun.compare import spool_history
    from labrun.plots import plot_history
    from labrun.queries import list_runs
    from labrun.spoolfits import fit_history

    history = spool_history(store, label)  # InputError for an unknown label
    fits = fit_history(store, label)
    runs = list_runs(store, spool=label)
    sections = ["<h2>Runs</h2>" + _table(
        ["run", "status", "points", "created (UTC)", "plan"],
        [[_cell(str(r.run_id), True), _cell(_e(r.status)),
          _cell(f"{r.points_done}/{r.points_total}", True), _cell(_e(str(r.created_at)[:19])),
          _cell(_e(r.plan_name))] for r in runs.itertuples()])]
    if fits:
        with tempfile.TemporaryDirectory() as tmp:
            sections.append("<h2>Fits over time</h2>" + _img(
                plot_history(Path(tmp) / "history.png", history), "history"))
        sections.append(f"<p>{_e(_changes_text(history))}</p>")
        sections.append(f"<h2>Latest fit ({fits[-1].fit_id})</h2>" + _table(
            FIT_HEAD, _fit_rows(fits[-1])))
    return _page(f"labrun spool {label}", sections)


def _changes_text(history: dict[str, Any]) -> str:
    """The spool page's sentence on changes between fits, as ``labrun compare LABEL`` flags
    them: each value against the previous fit that claims a U for it (fits without U skipped)."""
    said = [f"fit {h['fit_id']}: {k} changed beyond the two fits' expanded uncertainties "
            f"combined (vs fit {h.get('compared_with', {}).get(k)})"
            for h in history["history"] for k in h["changed"]]
    if said:
        return "; ".join(said)
    return ("no change beyond the two fits' expanded uncertainties combined between fits that "
            "claim a U (fits without U are not compared)")


def write_report(store: Store, out: str | Path, *, run_id: int | None = None,
                 spool: str | None = None) -> Path:
    """Write the run's (or spool's) page to ``out``; returns the path."""
    text = run_report(store, run_id) if run_id is not None else spool_report(store, spool or "")
    path = Path(out)
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write the report: {exc.strerror or exc}", file=str(path),
                         field="--out") from None
    return path
