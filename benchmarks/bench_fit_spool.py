"""Exact-model spool fit speed and accuracy (issue 9, item 2). Not a test.

Runs the shipped power sweep (25 points) and the first 30 points of the shipped spacing sweep
on the virtual lab (default scenario, seed 7, realism on), then times
``labrun.exactfit.fit_spool`` on both runs together, without and with the GUM budget. Prints
the times against the target (<= 30 s on one core for 25 + 30 points), as multiples of one
forward-model pass (every point through the split-step once, timed in the same run) and of the
closed-form fit, and the fitted values against the scenario's spool.
Run: python benchmarks/bench_fit_spool.py
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.exactfit import fit_spool
from labrun.fits import PolFrame, fit_run, points_table
from labrun.physics.nlse import propagate_tones
from labrun.physics.units import dbm_to_w
from labrun.plan import load_plan
from labrun.queries import run_points
from labrun.store import open_store
from labrun.uncertainty import Uncertainties
from labrun.vlab import VirtualLab
from labrun.vlab.scenario import load_scenario

TARGET_S = 30.0


def main() -> None:
    scenario = load_scenario("default-scenario.toml")
    spool = scenario.spool()
    with tempfile.TemporaryDirectory() as tmp:
        store = open_store(str(Path(tmp) / "b.db"))
        with VirtualLab(scenario, time_scale=0.0, seed=7) as lab:
            bench = load_bench(lab.write_bench(Path(tmp) / "bench.toml"))
            tables = []
            for name in ("power-sweep.toml", "spacing-sweep.toml"):
                out = run_plan(load_plan(name), bench, store, operator="benchmark",
                               unattended=True, ack_safety=True, progress=False)
                tables.append(run_points(store, out.run_id, include_reference=False,
                                         limits=True))
        store.close()
    tables[1] = tables[1].iloc[:30]
    n = sum(len(t) for t in tables)
    fibre = spool.fibre()
    t0 = time.perf_counter()
    for tab in tables:
        for _, row in tab.iterrows():
            propagate_tones(fibre, float(row["wavelength_a_nm"]), float(row["spacing_ghz"]),
                            float(dbm_to_w(row["power_a_dbm"])),
                            float(dbm_to_w(row["power_b_dbm"])), 2, rtol=1e-3)
    t_pass = time.perf_counter() - t0
    pooled = [points_table(t) for t in tables]
    t0 = time.perf_counter()
    fit_run(tables[0].to_dict("records") + tables[1].to_dict("records"), spool.length_km,
            spool.loss_db_per_km)
    t_closed = time.perf_counter() - t0
    kw = {"reference_wavelength_nm": spool.reference_wavelength_nm,
          "polarisation": PolFrame.from_bench(bench.polarisation)}
    t0 = time.perf_counter()
    res = fit_spool(pooled, spool.length_km, spool.loss_db_per_km, **kw)
    t_fit = time.perf_counter() - t0
    unc = Uncertainties.from_calibration(bench.calibration, length_rel=0.0, loss_db_per_km=0.0)
    t0 = time.perf_counter()
    res_u = fit_spool(pooled, spool.length_km, spool.loss_db_per_km, uncertainties=unc, **kw)
    t_budget = time.perf_counter() - t0
    print(f"{len(tables[0])} power + {len(tables[1])} spacing points ({n}) of {spool.name}")
    print(f"  one forward-model pass (split-step per point): {t_pass:6.2f} s")
    print(f"  closed-form fit_run:                           {t_closed:6.2f} s")
    for label, t in (("fit_spool", t_fit), ("fit_spool + GUM budget", t_budget)):
        verdict = "ok" if t <= TARGET_S else "OVER TARGET"
        print(f"  {label:<24} {t:6.2f} s = {t / t_pass:5.1f} passes = "
              f"{t / t_closed:6.1f} x closed form  (target <= {TARGET_S:.0f} s: {verdict})")
    truth = {"gamma": spool.gamma_per_w_per_km, "dispersion": spool.dispersion_ps_per_nm_km,
             "dispersion_slope": spool.dispersion_slope_ps_per_nm2_km}
    for key, true in truth.items():
        r = res_u.get(key)
        if r is not None:
            print(f"  {key:<17} {r.value:9.5f} U(k=2) {r.u95:.5f}  truth {true:g}  "
                  f"error {100 * (r.value - true) / abs(true):+.2f} %  "
                  f"({'inside' if abs(r.value - true) <= r.u95 else 'OUTSIDE'} U)")
    assert res["gamma"].value > 0


if __name__ == "__main__":
    main()
