"""Split-step accuracy per line against time per point (issue 9, item 1). Not a test.

For each per-line tolerance rtol of labrun.physics.nlse, over a grid of virtual-lab points on
the default scenario's two spools, prints the worst error of any line down to 90 dB below the
tones against the independent RK4IP reference of tests/_rk4ip.py (Hult, J. Lightwave Technol.
25(12), 3770 (2007); converged: 3000 steps, 512 samples, checked against 1500 steps), and the
mean and worst time per point, as a ratio to the reference's own time for the same point.
Target: worst error <= 0.01 dB at spool.SPOOL_RTOL.
Run: python benchmarks/bench_nlse_accuracy.py [--quick]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from _rk4ip import rk4ip_tones  # noqa: E402

from labrun.lines import grid_ks  # noqa: E402
from labrun.physics.nlse import propagate_tones  # noqa: E402
from labrun.physics.spool import SPOOL_RTOL  # noqa: E402
from labrun.physics.units import dbm_to_w  # noqa: E402
from labrun.vlab.scenario import load_scenario  # noqa: E402

ORDERS = 5
BELOW_DB = 90.0
TARGET_DB = 0.01


def grid(quick: bool) -> list[tuple[str, float, float]]:
    """(spool, dBm per tone, spacing GHz) points: the shipped sweeps' ranges and beyond."""
    powers = (5.0, 14.0) if quick else (-4.0, 5.0, 10.0, 14.0)
    spacings = (25.0, 141.4, 400.0) if quick else (25.0, 50.0, 100.0, 141.4, 200.0, 400.0)
    return [(s, p, d) for s in ("SMF-B02", "HNLF-A17") for p in powers for d in spacings]


def reference(fib, p_w: float, spacing_ghz: float, n_steps: int) -> tuple[np.ndarray, float]:
    """RK4IP line powers for grid_ks(ORDERS) and the time it took (s)."""
    t0 = time.perf_counter()
    ref = rk4ip_tones(p_w, p_w, spacing_ghz * 1e-3, fib.length_km, fib.alpha_per_km,
                      fib.beta2_at(1550.0), fib.beta3_at(1550.0), fib.gamma_per_w_per_km,
                      n_time=512, n_steps=n_steps)
    dt = time.perf_counter() - t0
    return np.array([ref[k] for k in grid_ks(ORDERS)]), dt


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smaller grid")
    args = ap.parse_args()
    scen = load_scenario("default-scenario.toml")
    points = grid(args.quick)
    refs = []
    worst_conv = 0.0
    for spool, p_dbm, sp in points:
        fib = scen.spool(spool).fibre()
        p = float(dbm_to_w(p_dbm))
        ref, t_ref = reference(fib, p, sp, 3000)
        half, _ = reference(fib, p, sp, 1500)
        m = ref >= ref.max() * 10 ** (-BELOW_DB / 10)
        worst_conv = max(worst_conv, float(np.max(np.abs(10 * np.log10(half[m] / ref[m])))))
        refs.append((fib, p, sp, ref, m, t_ref))
    print(f"{len(points)} points, {ORDERS} orders a side, lines down to {BELOW_DB:.0f} dB below "
          f"the tones; reference converged within {worst_conv:.1e} dB (1500 vs 3000 steps)")
    print(f"{'rtol':>7} {'worst dB':>9} {'mean ms':>8} {'max ms':>8} {'steps max':>9} "
          f"{'time/ref':>8}  verdict")
    for rtol in (1e-2, 3e-3, SPOOL_RTOL, 3e-4, 1e-4):
        worst, times, steps, ratio = 0.0, [], 0, []
        for fib, p, sp, ref, m, t_ref in refs:
            t0 = time.perf_counter()
            res = propagate_tones(fib, 1550.0, sp, p, p, ORDERS, rtol=rtol, method="split-step")
            dt = time.perf_counter() - t0
            times.append(dt)
            ratio.append(dt / t_ref)
            steps = max(steps, res.n_steps)
            worst = max(worst, float(np.max(np.abs(10 * np.log10(res.powers_w[m] / ref[m])))))
        mark = " (spool default)" if rtol == SPOOL_RTOL else ""
        ok = "ok" if worst <= TARGET_DB else "OVER 0.01 dB"
        print(f"{rtol:7.0e} {worst:9.4f} {1e3 * np.mean(times):8.1f} {1e3 * max(times):8.1f} "
              f"{steps:9d} {np.mean(ratio):8.3f}  {ok}{mark}")


if __name__ == "__main__":
    main()
