"""Speed of the spectrum reduction and of the fits (prints figures; not a test).

Targets (issue 4): reduce a 20,001-sample trace with 5 orders per side in <= 0.5 ms median
(>= 2,000 traces/s on one core); fit_run on 1,000 points in <= 100 ms.
Run: python benchmarks/bench_reduce.py [--repeat N]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from labrun.fits import fit_run
from labrun.lines import grid_ks, line_id
from labrun.physics.bessel import modulation_index, two_tone_powers
from labrun.physics.fibre import Fibre
from labrun.physics.fwm import small_signal_sideband_w
from labrun.physics.osa import synthesize_trace
from labrun.reduce import reduce_trace

C_NM_THZ = 299_792.458


def make_trace(orders: int = 5, samples: int = 20_001, rbw_nm: float = 0.02):
    """A 20,001-sample trace with both tones and `orders` sidebands per side (invented spool)."""
    ks = np.array(grid_ks(orders))
    f = 193.4137 + ks * 0.05
    wl = C_NM_THZ / f
    p = -10.0 - 9.0 * np.abs(np.where(ks > 0, ks - 1, ks)).astype(float)
    p[(ks == 0) | (ks == 1)] = 8.0
    x = np.linspace(wl.min() - 0.5, wl.max() + 0.5, samples)
    y = synthesize_trace(x, wl, p, rbw_nm, floor_dbm=-72.0, noise_db=0.1,
                         rng=np.random.default_rng(1))
    return x, y, rbw_nm, f


def make_points(n: int = 1000, seed: int = 0) -> list[dict]:
    """n points: a power sweep (Bessel regime) and a spacing sweep at three pump wavelengths."""
    rng = np.random.default_rng(seed)
    fib = Fibre(2.0, 0.6, 9.0, 2.5, 0.05, 1550.0)
    t = np.exp(-fib.alpha_per_km * fib.length_km)
    keys = [f"{line_id(k).kind}_{line_id(k).side}_{line_id(k).order}" for k in grid_ks(3)]
    pts = []
    for p in np.linspace(0.0, 20.0, n // 2):
        pw = 10 ** (p / 10) * 1e-3
        m = modulation_index(fib.gamma_per_w_per_km, fib.effective_length_km, pw, pw)
        dbm = 10 * np.log10(two_tone_powers(pw, pw, m, 3, t) * 1e3)
        row = dict(zip(keys, dbm + rng.normal(0, 0.1, dbm.size), strict=True))
        row.update(power_a_dbm=p, power_b_dbm=p, spacing_ghz=5.0, wavelength_a_nm=1550.0)
        pts.append(row)
    pw = 10 ** 0.5 * 1e-3
    per = (n - len(pts)) // 3
    for lam in (1540.0, 1550.0, 1560.0):
        sp = np.linspace(10.0, 150.0, per)
        hi = small_signal_sideband_w(fib, pw, pw, lam, sp, "high")
        lo = small_signal_sideband_w(fib, pw, pw, lam, sp, "low")
        for s, h, low in zip(sp, hi, lo, strict=True):
            nz = rng.normal(0, 0.1, 4)
            pts.append(dict(power_a_dbm=5.0, power_b_dbm=5.0, spacing_ghz=float(s),
                            wavelength_a_nm=lam,
                            tone_low_0=10 * np.log10(pw * t * 1e3) + nz[0],
                            tone_high_0=10 * np.log10(pw * t * 1e3) + nz[1],
                            sideband_low_1=10 * np.log10(low * 1e3) + nz[2],
                            sideband_high_1=10 * np.log10(h * 1e3) + nz[3]))
    return pts


def median_s(fn, repeat: int) -> float:
    """Median wall time of fn() over repeat calls (after one warm-up)."""
    fn()
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    """Print the two figures against their targets."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=500)
    args = ap.parse_args()
    x, y, rbw, f = make_trace()
    t_free = median_s(lambda: reduce_trace(x, y, rbw, orders=5), args.repeat)
    t_exp = median_s(lambda: reduce_trace(x, y, rbw, orders=5, expected_thz=(f[5], f[6])),
                     args.repeat)
    print(f"reduce_trace, {x.size} samples, 5 orders/side, tones found: "
          f"{t_free * 1e3:.3f} ms median ({1 / t_free:,.0f} traces/s; target <= 0.5 ms)")
    print(f"reduce_trace, same trace, expected tone positions given: "
          f"{t_exp * 1e3:.3f} ms median ({1 / t_exp:,.0f} traces/s)")
    pts = make_points(1000)
    t_fit = median_s(lambda: fit_run(pts, 2.0, 0.6), max(3, args.repeat // 50))
    res = fit_run(pts, 2.0, 0.6)
    print(f"fit_run, {len(pts)} points ({len(res)} results): {t_fit * 1e3:.1f} ms median "
          f"(target <= 100 ms)")


if __name__ == "__main__":
    main()
