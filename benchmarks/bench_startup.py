"""Start-up benchmark (issue 11, item 5): prints figures, asserts nothing.

1. ``labrun status`` as a cold process on a store of one run (targets: <= 0.3 s), against a plain
   ``python -c`` script written here that opens the same SQLite file with sqlite3 and runs the
   same queries (run row, point count, recent point times, last point, its lines, faults) and
   prints them, and against the bare interpreter (``python -c pass``), all in the same run.
2. ``labrun run`` start-up: from the process's start to its first exchange with an instrument
   (the first line of its ``--traffic-log``), on the virtual lab served from its own process at
   time scale 0, against the bare interpreter's start in the same run (target: half of labrun
   0.2.0's, which was about 1.1 s, 90 % imports). Also shown: the whole run of 2 points.

   With ``--before DIR`` (a checkout of an earlier labrun, e.g. ``git worktree add DIR v0.2.0``)
   the same runs alternate between that code (put first on PYTHONPATH) and this one, so both
   figures come from the same minutes of a shared machine.

    python benchmarks/bench_startup.py [--repeats 7] [--points 200] [--run-repeats 5]
                                       [--before DIR]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from served import serve

# The plain script: the same reads as labrun status, with nothing but sqlite3 and json.
PLAIN_STATUS = r"""
import json, sqlite3, sys
con = sqlite3.connect("file:" + sys.argv[1] + "?mode=ro", uri=True, timeout=15)
(rid,), = con.execute("SELECT max(id) FROM runs").fetchall()
run = con.execute("SELECT id, status, reason, plan_name, operator, bench_name, settings, "
                  "points_total, started_at, finished_at, heartbeat_at, replay_of FROM runs "
                  "WHERE id = ?", (rid,)).fetchone()
(done,), = con.execute("SELECT count(id) FROM points WHERE run_id = ?", (rid,)).fetchall()
times = con.execute("SELECT finished_at FROM points WHERE run_id = ? ORDER BY id DESC LIMIT 21",
                    (rid,)).fetchall()
last = con.execute('SELECT id, key, "index", setpoint, finished_at FROM points WHERE run_id = ? '
                   "ORDER BY id DESC LIMIT 1", (rid,)).fetchone()
lines = con.execute('SELECT lines.kind, lines.side, lines."order", lines.power_dbm FROM lines '
                    "LEFT OUTER JOIN traces ON traces.id = lines.trace_id WHERE lines.point_id = ? "
                    "AND (traces.kind IS NULL OR traces.kind = 'output') ORDER BY lines.id",
                    (last[0],)).fetchall()
(faults,), = con.execute("SELECT count(id) FROM events WHERE run_id = ? AND kind = 'fault'",
                         (rid,)).fetchall()
print(json.dumps({"run": run, "done": done, "last": last, "lines": lines, "faults": faults,
                  "settings": json.loads(run[6]), "times": len(times)}))
"""


def _wall(argv: list[str]) -> float:
    """Wall time of one cold process (output discarded; a failure stops the benchmark)."""
    t0 = time.perf_counter()
    subprocess.run(argv, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def _median(argv: list[str], repeats: int) -> float:
    """Median wall time of ``repeats`` cold processes, interleaving nothing else."""
    return statistics.median(_wall(argv) for _ in range(repeats))


def _store(folder: Path, points: int) -> Path:
    """A store with one finished run of ``points`` points (8 lines each) and one fault."""
    import numpy as np

    from labrun.store import TraceData, open_store

    db = folder / "runs.db"
    store = open_store(db)
    try:
        run_id = store.create_run(plan_text="", plan_sha256="0" * 64, bench_text="",
                                  software_version="bench", points_total=points,
                                  status="running", plan_name="bench", operator="bench")
        x = np.linspace(1545.0, 1556.0, 513)
        lines = [dict(kind="tone" if o == 0 else "sideband", side=s, order=o,
                      power_dbm=-30.0 - o) for s in ("low", "high") for o in range(4)]
        for i in range(points):
            store.add_point(run_id, key=f"p{i}", index=i, setpoint={"i": i},
                            traces=[TraceData(x, np.full(x.size, -60.0))], lines=lines)
        store.add_event(run_id, "fault", "osa: timeout", role="osa")
    finally:
        store.close()
    return db


def bench_status(folder: Path, repeats: int, points: int) -> None:
    """Item 1: labrun status against the plain sqlite3 script and the bare interpreter."""
    db = _store(folder, points)
    py = sys.executable
    _wall([py, "-m", "labrun", "status", "--db", str(db)])  # warm the file cache once
    bare = _median([py, "-c", "pass"], repeats)
    plain = _median([py, "-c", PLAIN_STATUS, str(db)], repeats)
    status = _median([py, "-m", "labrun", "status", "--db", str(db)], repeats)
    status_json = _median([py, "-m", "labrun", "status", "--db", str(db), "--json"], repeats)
    print(f"1. labrun status, cold process, median of {repeats} ({points} points stored):")
    print(f"   python -c pass            {bare:.3f} s")
    print(f"   plain sqlite3 script      {plain:.3f} s")
    print(f"   labrun status             {status:.3f} s (target <= 0.3 s; "
          f"{status / plain:.2f}x the plain script, +{status - plain:.3f} s)")
    print(f"   labrun status --json      {status_json:.3f} s ({status_json / plain:.2f}x)")


RUN_PLAN = """[plan]
name = "start-up benchmark"
spool = "HNLF-A17"
orders = 3

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
pol_angles_deg = [0.0, 0.0, 0.0]

[axes.power_a_dbm]
values = [-6.0, -4.0]

[axes.power_b_dbm]
values = [-6.0, -4.0]

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
"""


def _one_run(folder: Path, bench: Path, plan: Path, k: str,
             code: Path | None = None) -> tuple[float, float]:
    """One cold ``labrun run`` (of the labrun in ``code``, default this one): (process start to
    its first instrument exchange, to exit)."""
    import json
    import os

    env = dict(os.environ)
    if code is not None:
        env["PYTHONPATH"] = str(code)
    log = folder / f"traffic-{k}.jsonl"
    t0 = time.time()
    subprocess.run([sys.executable, "-m", "labrun", "run", str(plan), "--bench", str(bench),
                    "--db", str(folder / f"run-{k}.db"), "--unattended", "--operator",
                    "benchmark", "--ack-safety", "--no-progress", "--traffic-log", str(log)],
                   check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    t1 = time.time()
    first = min(json.loads(line)["timestamp"] for line in log.read_text().splitlines()
                if line.strip())
    return first - t0, t1 - t0


def bench_run_startup(folder: Path, repeats: int, before: Path | None) -> None:
    """Item 2: labrun run's start-up against the bare interpreter (and an earlier labrun)."""
    plan = folder / "startup-plan.toml"
    plan.write_text(RUN_PLAN)
    proc, bench = serve(folder)
    codes: list[tuple[str, Path | None]] = [("this labrun", None)]
    if before is not None:
        codes.insert(0, (f"before ({before})", before))
    rows: dict[str, list[tuple[float, float]]] = {label: [] for label, _ in codes}
    bare: list[float] = []
    try:
        for label, code in codes:  # warm the file cache once each
            _one_run(folder, bench, plan, f"warm-{len(rows[label])}-{label[:4]}", code)
        for k in range(repeats):
            bare.append(_wall([sys.executable, "-c", "pass"]))
            for label, code in codes:
                rows[label].append(_one_run(folder, bench, plan, f"{k}-{label[:4]}", code))
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    floor = statistics.median(bare)
    print(f"2. labrun run start-up, cold process, {repeats} runs each, alternating (virtual lab "
          f"at time scale 0, 2 points); median | best:")
    print(f"   python -c pass                      {floor:.3f} s")
    for label, _ in codes:
        first = sorted(r[0] for r in rows[label])
        whole = sorted(r[1] for r in rows[label])
        print(f"   {label}: start to first instrument exchange {statistics.median(first):.3f} | "
              f"{first[0]:.3f} s ({statistics.median(first) / floor:.1f}x bare python); "
              f"start to exit {statistics.median(whole):.3f} | {whole[0]:.3f} s")
    if before is not None:
        old = statistics.median(r[0] for r in rows[codes[0][0]])
        new = statistics.median(r[0] for r in rows[codes[1][0]])
        print(f"   first exchange: this / before = {new / old:.2f} (target <= 0.5)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--points", type=int, default=200)
    ap.add_argument("--run-repeats", type=int, default=5)
    ap.add_argument("--before", type=Path, default=None,
                    help="checkout of an earlier labrun to compare start-up with")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        bench_status(Path(tmp), args.repeats, args.points)
        bench_run_startup(Path(tmp), args.run_repeats, args.before)


if __name__ == "__main__":
    main()
