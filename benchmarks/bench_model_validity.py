"""Where the closed-form models stay within 0.1 dB of the split-step solution (issue 9, item 7).

Not a test. Prints, for an invented highly nonlinear spool (1 km, 0.9 dB/km, gamma 11 /(W km))
at 100 GHz spacing, the largest error (dB) of the Bessel model (docs/design.md §5.2) per
sideband order against the split-step NLSE (§5.4, per-line tolerance 1e-4) over dispersion and
power, and of the small-signal model (Inoue's efficiency with the SPM/XPM mismatch, §5.3) for
the first sidebands over power on the same spool and on a standard-fibre-like one (10 km,
0.2 dB/km, gamma 1.3, D 17). docs/models.md quotes these figures.
Run: python benchmarks/bench_model_validity.py
"""

from __future__ import annotations

import numpy as np

from labrun.lines import grid_ks
from labrun.physics.bessel import modulation_index, two_tone_powers
from labrun.physics.fibre import Fibre
from labrun.physics.fwm import inoue_efficiency_nl, sideband_mismatch_per_km
from labrun.physics.nlse import propagate_tones
from labrun.physics.spool import dispersion_figure
from labrun.physics.units import dbm_to_w

ORDERS = 3
POWERS = (-4.0, 0.0, 4.0, 8.0, 12.0, 16.0, 20.0)


def bessel_errors(fib: Fibre, spacing: float, p_dbm: float) -> list[float]:
    """Largest |Bessel - split-step| (dB) per order 1..ORDERS, lines above -90 dBc."""
    p = float(dbm_to_w(p_dbm))
    ref = propagate_tones(fib, 1550.0, spacing, p, p, ORDERS, rtol=1e-4,
                          method="split-step").powers_w
    m = modulation_index(fib.gamma_per_w_per_km, fib.effective_length_km, p, p)
    bes = two_tone_powers(p, p, float(m), ORDERS, np.exp(-fib.alpha_per_km * fib.length_km))
    ks = np.array(grid_ks(ORDERS))
    order = np.where(ks <= 0, -ks, ks - 1)
    out = []
    for n in range(1, ORDERS + 1):
        sel = (order == n) & (ref > ref.max() * 1e-9)
        out.append(float(np.max(np.abs(10 * np.log10(bes[sel] / ref[sel])))) if sel.any()
                   else float("nan"))
    return out


def small_signal_error(fib: Fibre, spacing: float, p_dbm: float) -> float:
    """|small-signal - split-step| (dB) of the high first-sideband-to-pump ratio."""
    p = float(dbm_to_w(p_dbm))
    w = propagate_tones(fib, 1550.0, spacing, p, p, 2, rtol=1e-4).powers_w
    ks = grid_ks(2)
    exact = w[ks.index(2)] / w[ks.index(1)]
    db = sideband_mismatch_per_km(fib, 1550.0, spacing, "high")
    eta = inoue_efficiency_nl(fib.alpha_per_km, db, fib.length_km,
                              fib.gamma_per_w_per_km * (p - 2 * p))
    model = eta * fib.gamma_per_w_per_km**2 * fib.effective_length_km**2 * p * p
    return float(abs(10 * np.log10(model / exact)))


def main() -> None:
    print(f"Bessel vs split-step, HNLF 1 km, 100 GHz: largest error (dB) per order 1..{ORDERS}")
    print(f"{'D ps/(nm km)':>12} {'figure':>8}  " + "  ".join(f"{p:>+6.0f} dBm" for p in POWERS))
    for d in (0.003, 0.01, 0.03, 0.1, 0.3, 1.0):
        fib = Fibre(1.0, 0.9, 11.0, d, 0.0, 1550.0)
        cells = []
        for p in POWERS:
            e = bessel_errors(fib, 100.0, p)
            cells.append("/".join(f"{x:.2f}" if np.isfinite(x) else "-" for x in e))
        fig = dispersion_figure(fib, 1550.0, 100.0)
        print(f"{d:12.3f} {fig:8.4f}  " + "  ".join(f"{c:>10}" for c in cells))
    print("\nsmall-signal (Inoue + SPM/XPM mismatch) vs split-step, high first sideband, dB")
    print(f"{'spool, spacing':>24}  " + "  ".join(f"{p:>+5.0f} dBm" for p in POWERS))
    for label, fib, sp in (("HNLF D -0.3, 100 GHz", Fibre(1.0, 0.9, 11.0, -0.3, 0.019), 100.0),
                           ("HNLF D -0.3, 400 GHz", Fibre(1.0, 0.9, 11.0, -0.3, 0.019), 400.0),
                           ("SMF D 17, 25 GHz", Fibre(10.0, 0.2, 1.3, 17.0, 0.058), 25.0),
                           ("SMF D 17, 100 GHz", Fibre(10.0, 0.2, 1.3, 17.0, 0.058), 100.0)):
        errs = [small_signal_error(fib, sp, p) for p in POWERS]
        print(f"{label:>24}  " + "  ".join(f"{e:9.3f}" for e in errs))


if __name__ == "__main__":
    main()
