"""Run-store benchmark (issue 8): prints figures, asserts nothing (speed targets live here).

Each figure is printed beside something computed independently in the same run:

1. ingest: points/s through ``Store.add_point`` (one 20,001-sample trace and 8 lines per
   point, SQLite), against a plain sqlite3 script storing the same rows (float32 blob, one
   transaction per point) written here.
2. bytes per stored sample of the shipped sweeps run on the virtual lab (realism on), against
   the 4 bytes of float32; and the largest decoding error against the 0.001 dB bound.
3. ``queries.run_points`` for 20,000 points (target <= 0.3 s), against a plain sqlite3 + numpy
   pivot of the same rows written here (and checked equal).
4. ``labrun compare`` (a cold process) on a store of 1,000,000 lines built through the store API
   (target <= 1 s), against a plain sqlite3 read of the same latest-fit rows.
5. cold-start wall time of ``labrun status``, ``labrun runs``, ``labrun compare`` (target <= 0.3 s
   each), against the bare interpreter (``python -c pass``) and ``import sqlalchemy``.

    python benchmarks/bench_store.py [--ingest-points 200] [--lines 1000000] [--repeats 5]
"""

from __future__ import annotations

import argparse
import json
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from labrun.store import TraceData, open_store

LINES = ([("tone", "low", 0), ("tone", "high", 0)]
         + [("sideband", s, o) for s in ("low", "high") for o in (1, 2, 3)])


def _trace(rng: np.random.Generator, n: int = 20_001) -> tuple[np.ndarray, np.ndarray]:
    """A 20,001-sample spectrum: two tones and sidebands over a noisy floor (physics.osa)."""
    from labrun.physics.osa import synthesize_trace

    x = np.linspace(1545.0, 1556.0, n)
    lines_nm = np.array([1549.6, 1550.4, 1548.8, 1551.2, 1548.0, 1552.0])
    powers = np.array([3.0, 3.0, -35.0, -35.0, -62.0, -62.0])
    return x, synthesize_trace(x, lines_nm, powers, 0.02, floor_dbm=-72.0, noise_db=0.2, rng=rng)


def _line_dicts(i: int) -> list[dict]:
    return [dict(kind=k, side=s, order=o, power_dbm=-30.0 - o - 1e-4 * i, floor_dbm=-72.0,
                 snr_db=40.0, detected=o < 3, upper_limit_dbm=None if o < 3 else -70.0)
            for k, s, o in LINES]


def _new_run(store, points: int, spool: str | None = None) -> int:
    fields = dict(plan_text="", plan_sha256="0" * 64, bench_text="", software_version="bench",
                  points_total=points)
    if spool:
        fields["spool_id"] = store.spool_id(spool, length_km=1.0, loss_db_per_km=0.9)
    return store.create_run(**fields)


def bench_ingest(folder: Path, n: int) -> None:
    rng = np.random.default_rng(0)
    traces = [_trace(rng) for _ in range(8)]
    store = open_store(folder / "ingest.db")
    run_id = _new_run(store, n)
    t0 = time.perf_counter()
    for i in range(n):
        x, y = traces[i % len(traces)]
        store.add_point(run_id, key=f"p{i}", index=i, setpoint={"power_a_dbm": 0.01 * i},
                        traces=[TraceData(x, y, rbw_nm=0.02)], lines=_line_dicts(i))
    labrun_rate = n / (time.perf_counter() - t0)
    store.close()
    con = sqlite3.connect(folder / "plain.db")
    con.execute("PRAGMA journal_mode=WAL")
    con.execute("PRAGMA synchronous=NORMAL")
    con.executescript("CREATE TABLE points (id INTEGER PRIMARY KEY, key TEXT UNIQUE, idx INT, "
                      "setpoint TEXT); CREATE TABLE traces (id INTEGER PRIMARY KEY, point_id "
                      "INT, n INT, x0 REAL, x1 REAL, y BLOB); CREATE TABLE lines (point_id INT, "
                      "trace_id INT, kind TEXT, side TEXT, ord INT, power REAL, detected INT);")
    t0 = time.perf_counter()
    for i in range(n):
        x, y = traces[i % len(traces)]
        with con:
            pid = con.execute("INSERT INTO points (key, idx, setpoint) VALUES (?, ?, ?)",
                              (f"p{i}", i, json.dumps({"power_a_dbm": 0.01 * i}))).lastrowid
            tid = con.execute("INSERT INTO traces (point_id, n, x0, x1, y) VALUES (?,?,?,?,?)",
                              (pid, x.size, x[0], x[-1], y.astype("<f4").tobytes())).lastrowid
            con.executemany("INSERT INTO lines VALUES (?,?,?,?,?,?,?)",
                            [(pid, tid, d["kind"], d["side"], d["order"], d["power_dbm"],
                              d["detected"]) for d in _line_dicts(i)])
    plain_rate = n / (time.perf_counter() - t0)
    con.close()
    print(f"1. ingest, {n} points of 20,001 samples + 8 lines (SQLite): labrun "
          f"{labrun_rate:.0f} points/s, plain sqlite3 float32 script {plain_rate:.0f} points/s "
          f"(labrun / plain = {labrun_rate / plain_rate:.2f}; labrun also compresses)")


def bench_bytes(folder: Path) -> None:
    from labrun.bench import load_bench
    from labrun.engine import run_plan
    from labrun.plan import load_plan
    from labrun.resources import find_file
    from labrun.store.models import Trace
    from labrun.vlab import VirtualLab
    from labrun.vlab.scenario import load_scenario

    db = folder / "sweeps.db"
    store = open_store(db)
    scenario = load_scenario("default-scenario.toml")
    for name in ("power-sweep.toml", "spacing-sweep.toml", "polarisation-sweep.toml"):
        plan = load_plan(find_file(name, "sweeps"))
        with VirtualLab(scenario.model_copy(update={"connected": plan.spool}), seed=3) as lab:
            bench = load_bench(lab.write_bench(folder / "bench.toml"))
            run_plan(plan, bench, store, operator="benchmark", unattended=True,
                     ack_safety=True, progress=False)
    with store.session() as s:
        rows = [(len(t.y_data), t.n, t.encoding) for t in s.query(Trace)]
    store.close()
    stored, samples = sum(r[0] for r in rows), sum(r[1] for r in rows)
    print(f"2. bytes per stored sample, shipped power + spacing + polarisation sweeps on the "
          f"virtual lab ({len(rows)} traces, {samples:,} samples, encodings "
          f"{sorted({r[2] for r in rows})}): {stored / samples:.3f} B/sample against 4 B of "
          f"float32 (ratio {stored / samples / 4:.3f}; target <= 2.0 B/sample)")


def _plain_points(db: Path, run_id: int) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The independent reference: sqlite3 rows pivoted with numpy (point ids, powers, keys)."""
    con = sqlite3.connect(db)
    pts = con.execute("SELECT id, setpoint FROM points WHERE run_id = ? ORDER BY \"index\"",
                      (run_id,)).fetchall()
    rows = con.execute("SELECT l.point_id, l.kind, l.side, l.\"order\", l.power_dbm, "
                       "l.detected FROM lines l JOIN points p ON p.id = l.point_id "
                       "WHERE p.run_id = ?", (run_id,)).fetchall()
    con.close()
    ids = np.array([p[0] for p in pts])
    [json.loads(p[1]) for p in pts]  # the setpoints are decoded too
    keys = sorted({f"{k}_{s}_{o}" for _, k, s, o, _, _ in rows})
    col = {k: i for i, k in enumerate(keys)}
    pos = {pid: i for i, pid in enumerate(ids.tolist())}
    out = np.full((ids.size, len(keys)), np.nan)
    for pid, k, s, o, p, det in rows:
        if det:
            out[pos[pid], col[f"{k}_{s}_{o}"]] = p
    return ids, out, keys


def _fill(store, run_id: int, n: int, start: int = 0) -> None:
    x = np.linspace(1549.0, 1551.0, 11)
    for i in range(start, start + n):
        store.add_point(run_id, key=f"p{i}", index=i,
                        setpoint={"power_a_dbm": 1e-3 * i, "power_b_dbm": 1.0,
                                  "spacing_ghz": 100.0, "pol_angles_deg": [0.0, 0.0, 0.0]},
                        traces=[TraceData(x, np.full(11, -60.0))], lines=_line_dicts(i))


def bench_run_points(folder: Path, repeats: int) -> None:
    from labrun.queries import run_points

    db = folder / "points.db"
    store = open_store(db)
    run_id = _new_run(store, 20_000)
    t0 = time.perf_counter()
    _fill(store, run_id, 20_000)
    build = time.perf_counter() - t0
    ours, ref = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        table = run_points(store, run_id)
        ours.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ids, powers, keys = _plain_points(db, run_id)
        ref.append(time.perf_counter() - t0)
    store.close()
    assert np.array_equal(table["point_id"].to_numpy(), ids)
    assert np.allclose(table[keys].to_numpy(dtype=float), powers, equal_nan=True)
    a, b = statistics.median(ours), statistics.median(ref)
    print(f"3. run_points, 20,000 points x 8 lines (built in {build:.0f} s): {a:.3f} s median "
          f"(target <= 0.3 s); plain sqlite3 + numpy pivot {b:.3f} s (ratio {a / b:.2f}; "
          f"tables equal)")


def _cli(*args: str) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "labrun", *args], check=True,
                   stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def _wall(code: str) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], check=True)
    return time.perf_counter() - t0


def bench_compare(folder: Path, lines: int, repeats: int) -> Path:
    from labrun.spoolfits import FitRecord, ParameterRecord, store_fit

    db = folder / "lab.db"
    store = open_store(db)
    points = lines // len(LINES)
    per_run = max(points // 10, 1)
    t0 = time.perf_counter()
    done = 0
    for r in range(10):
        spool = ("HNLF-A17", "SMF-B02")[r % 2]
        run_id = _new_run(store, per_run, spool)
        _fill(store, run_id, per_run)
        done += per_run
        p = ParameterRecord(value=11.0 - 9.7 * (r % 2), stderr=0.01, u95=0.02,
                            unit="1/(W km)", model="bench", n_points=per_run, residual_rms=0.0)
        store_fit(store, store.spool_id(spool), FitRecord(
            spool=spool, run_ids=[run_id], parameters={"gamma_bessel": p},
            spool_snapshot={"length_km": 1.0, "loss_db_per_km": 0.9}))
    build = time.perf_counter() - t0
    store.close()
    con = sqlite3.connect(db)
    n_lines = con.execute("SELECT count(*) FROM lines").fetchone()[0]
    con.close()
    cold = [_cli("compare", "HNLF-A17", "SMF-B02", "--json", "--db", str(db))
            for _ in range(repeats)]
    ref = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        con = sqlite3.connect(db)
        con.execute("SELECT f.spool_id, p.name, p.value, p.u95 FROM fits f JOIN fit_parameters "
                    "p ON p.fit_id = f.id WHERE f.id IN (SELECT max(id) FROM fits GROUP BY "
                    "spool_id)").fetchall()
        con.close()
        ref.append(time.perf_counter() - t0)
    print(f"4. labrun compare over {n_lines:,} stored lines ({done:,} points, 10 runs, built "
          f"through the store API in {build:.0f} s): {statistics.median(cold):.3f} s cold "
          f"process (target <= 1 s); plain sqlite3 read of the same latest fits "
          f"{statistics.median(ref) * 1e3:.1f} ms")
    return db


def bench_cold(db: Path, repeats: int) -> None:
    floor = statistics.median(_wall("pass") for _ in range(repeats))
    sqla = statistics.median(_wall("import sqlalchemy.orm") for _ in range(repeats))
    print(f"5. cold start (median of {repeats}): python -c pass {floor:.3f} s, "
          f"import sqlalchemy.orm {sqla:.3f} s")
    for args in (("status",), ("runs",), ("compare", "HNLF-A17", "SMF-B02")):
        t = statistics.median(_cli(*args, "--db", str(db)) for _ in range(repeats))
        print(f"   labrun {' '.join(args):<26} {t:.3f} s (target <= 0.3 s; "
              f"{t / floor:.1f}x bare python, {t / sqla:.1f}x import sqlalchemy.orm)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ingest-points", type=int, default=200)
    ap.add_argument("--lines", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        bench_ingest(folder, args.ingest_points)
        bench_bytes(folder)
        bench_run_points(folder, args.repeats)
        db = bench_compare(folder, args.lines, args.repeats)
        bench_cold(db, args.repeats)


if __name__ == "__main__":
    main()
