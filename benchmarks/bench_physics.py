"""Physics speed figures: split-step per point, spool.output_lines, OSA synthesis (20,001 points).

Prints figures against the issue-3 target (a virtual-lab point computed in <= 20 ms) and the
accuracy per line is in bench_nlse_accuracy.py. Not a test.
Run: python benchmarks/bench_physics.py
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable

import numpy as np

from labrun.physics.fibre import Fibre
from labrun.physics.nlse import propagate_tones
from labrun.physics.osa import sample_grid_nm, synthesize_trace
from labrun.physics.spool import SPOOL_RTOL, choose_model, output_lines
from labrun.physics.units import dbm_to_w

TARGET_MS = 20.0
# Invented spools in realistic ranges (HNLF-A17-like and SMF-B02-like; the SMF follows typical
# ITU-T G.652 values from memory: D 17 ps/(nm km), S 0.057 ps/(nm^2 km), 0.2 dB/km).
HNLF = Fibre(1.0, 0.8, 10.5, 0.4, 0.02, 1550.0)
SMF = Fibre(10.0, 0.2, 1.3, 17.0, 0.057, 1550.0)
CASES = [
    ("HNLF 1 km, 2 x 15 dBm, 50 GHz", HNLF, 15.0, 50.0),
    ("HNLF 1 km, 2 x 20 dBm, 100 GHz", HNLF, 20.0, 100.0),
    ("SMF 10 km, 2 x 15 dBm, 25 GHz", SMF, 15.0, 25.0),
    ("SMF 10 km, 2 x 17 dBm, 50 GHz", SMF, 17.0, 50.0),
    ("SMF 10 km, 2 x 20 dBm, 100 GHz", SMF, 20.0, 100.0),
]


def best_ms(fn: Callable[[], object], repeat: int = 7) -> float:
    """Best wall time of repeat calls, in ms (best-of filters machine noise)."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return 1e3 * min(times)


def verdict(ms: float) -> str:
    """Compare with the 20 ms target."""
    return "ok" if ms <= TARGET_MS else "OVER TARGET"


def bench_split_step() -> None:
    """Split-step per point at the solver's default rtol and at the spool's rtol."""
    print(f"split-step per point, 3 orders (target <= {TARGET_MS:.0f} ms per virtual-lab point)")
    for name, fibre, p_dbm, spacing in CASES:
        p = float(dbm_to_w(p_dbm))
        for rtol in (1e-5, SPOOL_RTOL):
            res = propagate_tones(fibre, 1550.0, spacing, p, p, 3, rtol=rtol)
            ms = best_ms(
                lambda f=fibre, s=spacing, q=p, r=rtol: propagate_tones(
                    f, 1550.0, s, q, q, 3, rtol=r
                )
            )
            print(
                f"  {name:34s} rtol {rtol:.0e}: {ms:7.2f} ms  {res.n_steps:5d} steps  "
                f"N={res.n_samples}  {verdict(ms)}"
            )


def bench_output_lines() -> None:
    """The call the virtual lab makes per OSA sweep."""
    print("spool.output_lines (what the virtual lab calls per sweep)")
    for name, fibre, p_dbm, spacing in CASES:
        model = choose_model(fibre, 1550.0, spacing)
        ms = best_ms(lambda f=fibre, s=spacing, q=p_dbm: output_lines(f, 1550.0, s, q, q, 3))
        print(f"  {name:34s} {model:6s}: {ms:7.2f} ms  {verdict(ms)}")
    flat = Fibre(1.0, 0.8, 10.5, 0.0, 0.0, 1550.0)
    ms = best_ms(lambda: output_lines(flat, 1550.0, 50.0, 20.0, 20.0, 3))
    print(f"  {'dispersion-free HNLF (Bessel)':34s} {'bessel':6s}: {ms:7.2f} ms  {verdict(ms)}")


def bench_osa() -> None:
    """OSA synthesis for 20,001 samples and the lines of a 3-order spectrum."""
    lines = output_lines(HNLF, 1550.0, 100.0, 18.0, 18.0, 3)
    wl = [x.wavelength_nm for x in lines]
    pw = [x.power_dbm for x in lines]
    rng = np.random.default_rng(0)
    print("OSA synthesis, 20,001 samples, 8 lines")
    for span, rbw in ((5.0, 0.02), (10.0, 0.1), (10.0, 1.0)):
        x = sample_grid_nm(1549.0, span, 20001)
        ms = best_ms(
            lambda x=x, r=rbw: synthesize_trace(
                x, wl, pw, r, noise_db=1.0, ase_dbm_per_nm=-45.0, rng=rng
            )
        )
        print(f"  span {span:4.1f} nm, RBW {rbw:5.2f} nm: {ms:7.2f} ms  {verdict(ms)}")


if __name__ == "__main__":
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"{os.cpu_count()} CPUs, load average {load:.2f} (figures are best of 7 runs)")
    bench_split_step()
    bench_output_lines()
    bench_osa()
