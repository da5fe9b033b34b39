"""Plots for people: a trace with its lines labelled, and fit results against their data.

matplotlib with the Agg backend (no display needed); every function writes one PNG and returns
its path.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from labrun.errors import InputError  # noqa: E402
from labrun.reduce import Reduction  # noqa: E402


def _save(fig: plt.Figure, path: str | Path) -> Path:
    """Write the figure as PNG and close it; an unwritable path is a one-line input error."""
    out = Path(path)
    try:
        fig.savefig(out)
    except OSError as exc:
        raise InputError(f"cannot write the plot: {exc.strerror or exc}", file=str(out)) from None
    finally:
        plt.close(fig)
    return out


def plot_trace(path: str | Path, x: np.ndarray, y_dbm: np.ndarray, reduction: Reduction, *,
               x_unit: str = "nm", title: str | None = None) -> Path:
    """Trace in dBm with each line marked: detected lines by their power, others by limit."""
    fig, ax = plt.subplots(figsize=(10, 5), dpi=110)
    ax.plot(x, y_dbm, lw=0.8, color="0.25", label="trace")
    for ln in reduction.lines:
        xpos = ln.wavelength_nm if x_unit == "nm" else ln.freq_thz
        label = ln.line_id.label()
        if ln.detected and ln.power_dbm is not None:
            ax.plot([xpos], [ln.power_dbm], "o", ms=5, color="tab:red" if ln.saturated
                    else ("tab:blue" if ln.kind == "tone" else "tab:orange"))
            ax.annotate(f"{label}\n{ln.power_dbm:.1f}", (xpos, ln.power_dbm),
                        textcoords="offset points", xytext=(0, 6), ha="center", fontsize=7)
        elif ln.upper_limit_dbm is not None:
            ax.plot([xpos], [ln.upper_limit_dbm], "v", ms=5, color="tab:gray")
            ax.annotate(f"{label}\n<{ln.upper_limit_dbm:.1f}", (xpos, ln.upper_limit_dbm),
                        textcoords="offset points", xytext=(0, 6), ha="center", fontsize=7,
                        color="tab:gray")
    finite = np.asarray(y_dbm)[np.isfinite(y_dbm)]
    if finite.size:  # headroom so the labels of the strongest lines stay inside the axes
        ax.set_ylim(top=float(finite.max()) + 0.12 * float(np.ptp(finite) or 10.0))
    if reduction.floor_dbm is not None:
        ax.axhline(reduction.floor_dbm, ls=":", lw=0.8, color="tab:green", label="floor")
    top = max([float(np.max(y_dbm))] + [ln.power_dbm or -np.inf for ln in reduction.lines])
    ax.set_ylim(top=top + 10.0)  # room for the labels above the tallest line
    ax.set_xlabel("wavelength (nm)" if x_unit == "nm" else "frequency (THz)")
    ax.set_ylabel("power (dBm per RBW)")
    spacing = f"{reduction.spacing_ghz:.2f} GHz" if reduction.spacing_ghz else "n/a"
    flags = f"; flags: {', '.join(reduction.flags)}" if reduction.flags else ""
    ax.set_title(title or f"spacing {spacing}{flags}", fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(loc="upper right", fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def plot_power_slopes(path: str | Path, points, results: dict, *, max_order: int = 3) -> Path:
    """Sideband power against total launched power, per order, with each fitted dB/dB slope.

    ``points`` and ``results`` as for and from ``labrun.fits.fit_run``.
    """
    from labrun.fits import points_table

    t = points_table(points)
    total = 10.0 * np.log10(10 ** (t["power_a_dbm"] / 10) + 10 ** (t["power_b_dbm"] / 10))
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=110)
    for side, marker in (("low", "o"), ("high", "s")):
        for order in range(1, max_order + 1):
            key = f"sideband_{side}_{order}"
            if key not in t:
                continue
            y = t[key]
            ok = np.isfinite(y)
            if not ok.any():
                continue
            fit = results.get(f"slope_{side}_{order}")
            label = f"{side} {order}"
            if fit is not None:
                label += f": {fit.value:.3f} ± {fit.stderr:.1g} dB/dB"
            ax.plot(total[ok], y[ok], marker, ms=3.5, label=label)
    ax.set_xlabel("total launched power (dBm)")
    ax.set_ylabel("sideband power (dBm)")
    ax.set_title("power-law slopes per order", fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7)
    fig.tight_layout()
    return _save(fig, path)


def u_kinds(entries: list[dict]) -> str:
    """'U k=2', 'U95 t' or 'U k=2 / U95 t': the kinds of expanded uncertainty among the entries
    that claim one (as labrun fit labels them; spoolfits.u_label), '-' for none."""
    from labrun.compare import comparable
    from labrun.spoolfits import u_label

    kinds = sorted({u_label(e.get("u95_kind")) for e in entries if e and comparable(e)})
    return " / ".join(kinds) or "-"


_COMPARED = (("gamma_per_w_per_km", "gamma (1/(W km))"),
             ("dispersion_ps_per_nm_km", "D or |D| (ps/(nm km))"),
             ("first_sideband_efficiency_db", "1st sideband / pump (dB)"))


def plot_comparison(path: str | Path, comparison: dict) -> Path:
    """Spools side by side: one panel per compared quantity, value with its expanded
    uncertainty as error bar, labelled by kind (U k=2, U95 t)."""
    from labrun.spoolfits import u_label

    spools = comparison["spools"]
    fig, axes = plt.subplots(1, len(_COMPARED), figsize=(4 * len(_COMPARED), 4), dpi=110)
    for ax, (key, title) in zip(axes, _COMPARED, strict=True):
        labels, values, errors, colours = [], [], [], []
        for sp in spools:
            entry = sp.get(key)
            if entry and entry.get("value") is not None:
                no_u = entry.get("comparable") is False  # no U: drawn grey, labelled
                labels.append(sp["spool"] + ("\n(no U, not comparable)" if no_u else
                                             f"\n({u_label(entry.get('u95_kind'))})"
                                             if entry.get("u95") is not None else ""))
                values.append(entry["value"])
                errors.append(entry.get("u95") or 0.0)
                colours.append("lightgrey" if no_u else "tab:blue")
        ax.bar(range(len(values)), values, color=colours, alpha=0.7)
        with_u = [i for i, c in enumerate(colours) if c != "lightgrey"]  # no bar for no U
        if with_u:
            ax.errorbar(with_u, [values[i] for i in with_u], yerr=[errors[i] for i in with_u],
                        fmt="none", capsize=6, color="black")
        ax.set_xticks(range(len(values)), labels)
        ax.set_title(title)
        ax.grid(axis="y", alpha=0.3)
    kinds = u_kinds([sp.get(k) for sp in spools for k, _ in _COMPARED])
    fig.suptitle(f"spools compared (headline fits; error bars: {kinds})")
    fig.tight_layout()
    return _save(fig, path)


def changed_marks(history: dict, key: str) -> list[int]:
    """Positions (fit index, oldest first) of the fits whose ``key`` value ``spool_history``
    flagged as changed: where plot_history draws its red rings."""
    return [i for i, h in enumerate(history["history"]) if key in h and key in h["changed"]]


def plot_history(path: str | Path, history: dict) -> Path:
    """One spool over time: each headline value per fit with its expanded uncertainty
    (labelled by kind), changed fits marked red."""
    keys = (("gamma_per_w_per_km", "gamma (1/(W km))"),
            ("dispersion_ps_per_nm_km", "D or |D| (ps/(nm km))"))
    fig, axes = plt.subplots(len(keys), 1, figsize=(8, 6), dpi=110, sharex=True)
    fits = history["history"]
    for ax, (key, title) in zip(axes, keys, strict=True):
        xs = [i for i, h in enumerate(fits) if key in h]
        ys = [fits[i][key]["value"] for i in xs]
        ax.plot(xs, ys, "-", color="tab:blue", alpha=0.5)
        grey = [i for i in xs if fits[i][key].get("comparable") is False]
        kept = [i for i in xs if i not in grey]
        ax.errorbar(kept, [fits[i][key]["value"] for i in kept],
                    yerr=[fits[i][key].get("u95") or 0.0 for i in kept], fmt="o", capsize=5,
                    color="tab:blue", label=f"error bars: {u_kinds([fits[i][key] for i in kept])}")
        if grey:  # no U (dispersion unknown): not comparable, no error bar, drawn apart
            ax.plot(grey, [fits[i][key]["value"] for i in grey], "s", ms=9, color="lightgrey",
                    mec="grey", label="no U: not comparable")
        bad = changed_marks(history, key)
        if bad:
            ax.plot(bad, [fits[i][key]["value"] for i in bad], "o", ms=12, mfc="none",
                    color="red", label="changed beyond the two fits' U combined")
        ax.set_ylabel(title)
        ax.grid(alpha=0.3)
        if xs:
            ax.legend(loc="best", fontsize=7)
    axes[-1].set_xticks(range(len(fits)),
                        [f"fit {h['fit_id']}\n{h['fitted_at'][:10]}" for h in fits])
    fig.suptitle(f"spool {history['spool']}: stored fits over time")
    fig.tight_layout()
    return _save(fig, path)
