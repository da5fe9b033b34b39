"""Engine benchmark: labrun against the time the instruments impose and against a plain script.

Prints figures; asserts nothing (speed targets live here, not in the test suite). Everything runs
on the virtual lab served from its own process (``labrun sim serve``), so its CPU is not counted
as labrun's.

1. Time scale 1 (realistic): a zipped power sweep (10 points, 0.3 s plan settle). The imposed
   time is computed here, independently of labrun's waits: per point, the longest settle time of
   what moved (the larger of the profile's, read from the driver files, and the plan's) plus the
   OSA sweep time of the virtual lab's own model (``vlab.state.sweep_time_s``), both x the time
   scale. Printed: a minimal plain pyvisa script (``plain_pyvisa.py``: the same points, the same
   setting commands, binary trace, ``*OPC?`` for each sweep, a CSV row per point) and labrun,
   each as a ratio to the imposed time. Target: labrun's point loop <= 1.03x imposed.
2. Time scale 0, 20,001-sample traces: labrun's time per point against the plain script's on the
   same points (best and median of repeats; the machine's speed drifts). Target <= 0.8x.
3. Memory over many points: labrun's resident set size and traced Python heap, sampled as
   points are stored. Target: flat.

    python benchmarks/bench_engine.py [--points 10] [--settle 0.3] [--fast-points 200]
                                      [--repeats 5] [--memory-points 2000]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path
from typing import Any

import plain_pyvisa
from plain_pyvisa import Step
from served import serve

from labrun import safety
from labrun.bench import load_bench
from labrun.engine import Runner, run_plan
from labrun.plan import load_plan
from labrun.rehearse import rehearse
from labrun.store import Store, open_store
from labrun.vlab.state import sweep_time_s

PLAN = """[plan]
name = "benchmark sweep"
spool = "HNLF-A17"
orders = 3

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
pol_angles_deg = [0.0, 0.0, 0.0]

[axes.power_a_dbm]
{axis}
settle_s = {settle}

[axes.power_b_dbm]
{axis}
settle_s = {settle}

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
repeats = {repeats}

[osa]
points = {samples}
"""


def _axis(n: int) -> str:
    """n distinct powers from -6 to 4 dBm (invented)."""
    vals = ", ".join(f"{-6.0 + 10.0 * i / max(n - 1, 1):.4f}" for i in range(n))
    return f"values = [{vals}]"


def _plan_text(n: int, samples: int, settle: float) -> str:
    """A zipped power sweep of n points (whole-sweep repeats beyond 5,000 values per axis: a
    plan axis holds at most 10,000)."""
    repeats = -(-n // 5000)
    if n % repeats:
        raise SystemExit(f"{n} points: use a multiple of {repeats}")
    return PLAN.format(axis=_axis(n // repeats), samples=samples, settle=settle,
                       repeats=repeats)


def _run_bench(folder: Path, bench_path: Path, n: int, samples: int,
               settle: float) -> tuple[float, int]:
    """One unattended run on a served bench; (wall seconds of run_plan, points stored)."""
    plan_path = _write_plan(folder, n, samples, settle)
    store = open_store(folder / f"bench-{time.monotonic_ns()}.db")
    t0 = time.perf_counter()
    out = run_plan(load_plan(plan_path), load_bench(bench_path), store, operator="benchmark",
                   unattended=True, ack_safety=True, progress=False)
    wall = time.perf_counter() - t0
    store.close()
    if out.status != "completed":
        raise SystemExit(f"benchmark run ended {out.status}: {out.reason}")
    return wall, out.points_done


# ------------------------------------------------------------------------------------------------
# the independent yardsticks: imposed time and the plain script's command table
# ------------------------------------------------------------------------------------------------
DRIVERS = Path(__file__).resolve().parents[1] / "drivers"
POWER_OPS = {("laser_a", "set_power_dbm"), ("laser_b", "set_power_dbm"),
             ("attenuator_a", "set_attenuation_db"), ("attenuator_b", "set_attenuation_db")}


def _driver_ops(bench_path: Path) -> dict[str, dict[str, dict[str, Any]]]:
    """Operations of each role's profile, read straight from the driver TOML files."""
    bench = tomllib.loads(bench_path.read_text())
    return {role: tomllib.loads((DRIVERS / f"{spec['profile']}.toml").read_text())["operations"]
            for role, spec in bench["instruments"].items()}


def _settings(setpoint: dict[str, Any], bench: Any) -> list[tuple[str, str, Any, int | None]]:
    """(role, operation, value, index) of every setting a point needs. The values (laser
    levels, attenuations) come from labrun's calibration arithmetic, so both sides send the same
    commands; the timing below does not use labrun."""
    got = safety.instrument_settings(setpoint, bench)
    out: list[tuple[str, str, Any, int | None]] = [
        ("laser_a", "set_wavelength_nm", got.wavelength_a_nm, None),
        ("laser_b", "set_wavelength_nm", got.wavelength_b_nm, None),
        ("attenuator_a", "set_wavelength_nm", got.wavelength_a_nm, None),
        ("attenuator_b", "set_wavelength_nm", got.wavelength_b_nm, None),
        ("laser_a", "set_power_dbm", got.laser_a_dbm, None),
        ("laser_b", "set_power_dbm", got.laser_b_dbm, None),
        ("attenuator_a", "set_attenuation_db", got.attenuation_a_db, None),
        ("attenuator_b", "set_attenuation_db", got.attenuation_b_db, None),
    ]
    for i, angle in enumerate(setpoint.get("pol_angles_deg") or (), start=1):
        out.append(("pol_controller", "set_angle_deg", angle, i))
    return out


def yardsticks(plan: Any, bench: Any, bench_path: Path, time_scale: float, plan_settle: float
               ) -> tuple[dict[str, list[str]], list[Step], list[float], dict[str, str]]:
    """The plain script's set-up and points, and the imposed seconds of each point.

    Imposed per point = time_scale x (longest settle of what moved, the larger of the profile's
    and the plan's for each setting, + the virtual lab's OSA sweep time).
    """
    ops = _driver_ops(bench_path)
    osa_ops = ops["osa"]
    osa = plan.osa_settings(bench)
    setup = {"osa": [osa_ops["set_center_nm"]["command"].format(value=osa.center_nm),
                     osa_ops["set_span_nm"]["command"].format(value=osa.span_nm),
                     osa_ops["set_rbw_nm"]["command"].format(value=osa.rbw_nm),
                     osa_ops["set_points"]["command"].format(value=int(osa.points)),
                     "FORM:DATA REAL,32", "FORM:BORD SWAP"]}
    first_settle = 0.0
    if "switch" in ops:
        setup["switch"] = [ops["switch"]["set_path"]["command"].format(value=1)]
        first_settle = float(ops["switch"]["set_path"].get("settle_s", 0.0))
    sweep_s = sweep_time_s(osa.span_nm, osa.rbw_nm, int(osa.points))
    steps: list[Step] = []
    imposed: list[float] = []
    last: dict[tuple[str, str, int | None], Any] = {}
    for n, spec in enumerate(plan.points()):
        commands: dict[str, list[str]] = {}
        settle = first_settle if n == 0 else 0.0
        for role, name, value, index in _settings(spec.setpoint, bench):
            if last.get((role, name, index)) == value:
                continue
            last[(role, name, index)] = value
            op = ops[role][name]
            fields = {"value": value} if index is None else {"value": value, "index": index}
            commands.setdefault(role, []).append(op["command"].format(**fields))
            plan_s = plan_settle if (role, name) in POWER_OPS else 0.0
            settle = max(settle, float(op.get("settle_s", 0.0)), plan_s)
        if n == 0:  # the sources are switched on at the first point
            settle = max([settle] + [float(ops[r]["output_on"].get("settle_s", 0.0))
                                     for r in ("laser_a", "laser_b", "attenuator_a",
                                               "attenuator_b")])
        steps.append(Step(commands, settle * time_scale,
                          [spec.setpoint.get("power_a_dbm"), spec.setpoint.get("power_b_dbm")]))
        imposed.append((settle + sweep_s) * time_scale)
    osa_cmds = {"sweep": osa_ops["sweep"]["command"], "trace_y": osa_ops["read_trace_y"]["query"]}
    return setup, steps, imposed, osa_cmds


def _resources(bench_path: Path) -> dict[str, str]:
    """role -> VISA resource of a served bench file."""
    return {role: spec["resource"]
            for role, spec in tomllib.loads(bench_path.read_text())["instruments"].items()}


def plain(folder: Path, time_scale: float, n: int, samples: int, settle: float
          ) -> tuple[float, list[float], list[float]]:
    """The plain script on a fresh served lab: (loop seconds, seconds per point, imposed per
    point)."""
    proc, bench_path = serve(folder, time_scale)
    try:
        plan = load_plan(_write_plan(folder, n, samples, settle))
        setup, steps, imposed, osa = yardsticks(plan, load_bench(bench_path), bench_path,
                                                time_scale, settle)
        total, per_point = plain_pyvisa.run(_resources(bench_path), setup, steps, folder,
                                            sweep=osa["sweep"], trace_y=osa["trace_y"])
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    return total, per_point, imposed


def _write_plan(folder: Path, n: int, samples: int, settle: float) -> Path:
    """The benchmark plan file."""
    path = folder / f"plan-{n}-{samples}-{settle:g}.toml"
    path.write_text(_plan_text(n, samples, settle))
    return path


class LoopClock:
    """Times labrun's point loop (Runner.run_points) and when each point was stored."""

    def __init__(self) -> None:
        self.loop_start = 0.0
        self.stored: list[float] = []
        original_run, original_add = Runner.run_points, Store.add_point
        clock = self

        def run_points(runner: Runner, *args: Any, **kwargs: Any) -> int:
            clock.loop_start = time.perf_counter()
            return original_run(runner, *args, **kwargs)

        def add_point(store: Store, *args: Any, **kwargs: Any) -> int:
            out = original_add(store, *args, **kwargs)
            clock.stored.append(time.perf_counter())
            return out

        Runner.run_points = run_points  # type: ignore[method-assign]
        Store.add_point = add_point  # type: ignore[method-assign]
        self._undo = (original_run, original_add)

    def restore(self) -> None:
        """Undo the hooks."""
        Runner.run_points, Store.add_point = self._undo  # type: ignore[method-assign]

    @property
    def loop_s(self) -> float:
        """From the loop's start to the last point stored (the last commit included)."""
        return self.stored[-1] - self.loop_start if self.stored else 0.0


def labrun_run(folder: Path, time_scale: float, n: int, samples: int, settle: float
               ) -> tuple[float, float, list[float], Any]:
    """labrun on a fresh served lab: (start-to-exit seconds of run_plan, point-loop seconds,
    seconds per point, `labrun check`'s rehearsal of the run: whole run and point loop)."""
    proc, bench_path = serve(folder, time_scale)
    clock = LoopClock()
    try:
        plan = load_plan(_write_plan(folder, n, samples, settle))
        estimate = rehearse(plan, load_bench(bench_path))
        wall, _ = _run_bench(folder, bench_path, n, samples, settle)
    finally:
        clock.restore()
        proc.terminate()
        proc.wait(timeout=30)
    marks = [clock.loop_start, *clock.stored]
    return (wall, clock.loop_s, [b - a for a, b in zip(marks, marks[1:], strict=False)],
            estimate)


def cli_run(folder: Path, time_scale: float, n: int, samples: int, settle: float
            ) -> tuple[float, float, float]:
    """``labrun run`` as a user starts it (its own process) on a fresh served lab: (process start
    to exit, process start to the first exchange on the wire, last exchange to exit) in s."""
    import json

    proc, bench_path = serve(folder, time_scale)
    log = folder / f"traffic-{time.monotonic_ns()}.jsonl"
    try:
        plan = _write_plan(folder, n, samples, settle)
        t0 = time.time()
        subprocess.run([sys.executable, "-m", "labrun", "run", str(plan), "--bench",
                        str(bench_path), "--db", str(folder / f"cli-{time.monotonic_ns()}.db"),
                        "--unattended", "--operator", "benchmark", "--ack-safety",
                        "--no-progress", "--traffic-log", str(log)],
                       check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        t1 = time.time()
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    rows = [json.loads(line) for line in log.read_text().splitlines() if line.strip()]
    last = max(r["timestamp"] + r["duration_s"] for r in rows)
    return t1 - t0, rows[0]["timestamp"] - t0, t1 - last


def realistic(folder: Path, n: int, time_scale: float, settle: float) -> None:
    """Figure 1: plain script and labrun against the imposed time, at a realistic time scale."""
    p_total, p_points, imposed = plain(folder, time_scale, n, 20001, settle)
    wall, loop, l_points, estimate = labrun_run(folder, time_scale, n, 20001, settle)
    total = sum(imposed)
    print(f"[1] time scale {time_scale:g}, {n} points, 20,001 samples, {settle:g} s plan settle "
          "per power step; imposed = longest settle of what moved + the lab's OSA sweep time")
    print(f"    imposed         {total:8.3f} s  (first point {imposed[0]:.3f} s, then "
          f"{statistics.mean(imposed[1:]) if len(imposed) > 1 else 0:.3f} s per point)")
    print(f"    plain script    {p_total:8.3f} s  ratio {p_total / total:6.3f}x  (first point "
          f"{p_points[0]:.3f} s)")
    print(f"    labrun loop     {loop:8.3f} s  ratio {loop / total:6.3f}x  (first point "
          f"{l_points[0]:.3f} s)   target <= 1.03x")
    print(f"    labrun run_plan {wall:8.3f} s  ratio {wall / total:6.3f}x  (in-process call: "
          f"{wall - loop:.3f} s outside the point loop)")
    whole, points = estimate.total_s, estimate.points_s
    print(f"    check estimate  {whole:8.3f} s  {100 * (whole / wall - 1):+6.1f} % of run_plan "
          f"(whole run: opening {estimate.opening_s:.3f} s + points {points:.3f} s + safe-off "
          f"{estimate.finish_s:.3f} s)   target within 5 %")
    print(f"    check, points   {points:8.3f} s  {100 * (points / loop - 1):+6.1f} % of the loop")
    cli, first, last = cli_run(folder, time_scale, n, 20001, settle)
    print(f"    labrun run CLI  {cli:8.3f} s  ratio {cli / total:6.3f}x  (own process: start to "
          f"first exchange {first:.3f} s, last exchange to exit {last:.3f} s)")


def overhead(folder: Path, n: int, repeats: int = 5) -> None:
    """Figure 2: labrun's time per point against the plain script's at time scale 0."""
    rows: list[tuple[float, float]] = []
    for _ in range(max(1, repeats)):
        _, p_points, _ = plain(folder, 0.0, n, 20001, 0.0)
        _, loop, _, _ = labrun_run(folder, 0.0, n, 20001, 0.0)
        rows.append((statistics.mean(p_points[1:]), loop / n))
    print(f"[2] time scale 0, 20,001-sample traces, {n} points x {len(rows)} repeats "
          "(best repeat | median repeat)")
    for label, k in (("plain script per point", 0), ("labrun per point", 1)):
        vals = sorted(r[k] for r in rows)
        print(f"    {label:<26}{1e3 * vals[0]:7.2f} |{1e3 * statistics.median(vals):6.2f} ms")
    best = min(r[1] for r in rows) / min(r[0] for r in rows)
    paired = statistics.median(r[1] / r[0] for r in rows)
    print(f"    labrun / plain            {best:7.3f} |{paired:6.3f} x   (best over best | median "
          "of each repeat's ratio)   target <= 0.8x")


def _rss_mib(pid: int | str = "self") -> float:
    """Resident set size of a process in MiB (Linux /proc; else this process's peak RSS)."""
    import os

    try:
        with open(f"/proc/{pid}/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20
    except OSError:
        import resource

        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _slope(samples: list[tuple[int, float]]) -> str:
    """Growth from the second sample (after warm-up) to the last, per 1000 points."""
    (k1, m1), (k2, m2) = samples[1], samples[-1]
    return f"{m2 - m1:+.1f} MiB = {(m2 - m1) / (k2 - k1) * 1000.0:+.3f} MiB per 1000 points"


def memory(folder: Path, n: int, samples: int) -> None:
    """Figure 3: labrun's RSS and traced Python heap sampled every n/10 stored points, with the
    virtual lab served from its own process (its memory is shown apart: it is not labrun's)."""
    import tracemalloc

    rows: list[tuple[int, float, float, float | None]] = []
    original = Store.add_point
    count = {"n": 0}
    proc, bench = serve(folder, 0.0)

    def sampled(self: Store, *args: Any, **kwargs: Any) -> int:
        out = original(self, *args, **kwargs)
        count["n"] += 1
        if count["n"] % max(n // 10, 1) == 0:
            heap = tracemalloc.get_traced_memory()[0] / 2**20
            lab = _rss_mib(proc.pid) if proc.poll() is None else None
            rows.append((count["n"], _rss_mib(), heap, lab))
        return out

    Store.add_point = sampled  # type: ignore[method-assign]
    tracemalloc.start()
    try:
        t0 = time.perf_counter()
        _run_bench(folder, bench, n, samples, 0.0)
        wall = time.perf_counter() - t0
    finally:
        tracemalloc.stop()
        Store.add_point = original  # type: ignore[method-assign]
        proc.terminate()
        proc.wait(timeout=30)
    print(f"[3] memory over {n} points ({samples}-sample traces, {wall:.0f} s, virtual lab served "
          "in its own process, tracemalloc on)")
    print("    " + "  ".join(f"{k}:{v:.0f}" for k, v, _, _ in rows) + "  (points:MiB labrun RSS)")
    if len(rows) >= 3:
        print(f"    labrun RSS growth after warm-up    {_slope([(k, v) for k, v, _, _ in rows])}"
              "  (target: flat)")
        print(f"    labrun Python heap (tracemalloc)   {_slope([(k, h) for k, _, h, _ in rows])}")
        lab_rows = [(k, m) for k, _, _, m in rows if m is not None]
        if len(lab_rows) >= 3:
            print(f"    served virtual lab RSS (not labrun) {_slope(lab_rows)}")


def main() -> None:
    """Run the figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=10, help="points for figure 1")
    ap.add_argument("--settle", type=float, default=0.3, help="plan settle (s), figure 1")
    ap.add_argument("--time-scale", type=float, default=1.0, help="time scale of figure 1")
    ap.add_argument("--fast-points", type=int, default=200, help="points for figure 2")
    ap.add_argument("--repeats", type=int, default=5, help="repeats of figure 2")
    ap.add_argument("--memory-points", type=int, default=2000, help="points for figure 3 "
                    "(0 skips it; the issue's 20,000 takes several minutes)")
    ap.add_argument("--memory-samples", type=int, default=20001, help="trace samples, figure 3")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        realistic(folder, args.points, args.time_scale, args.settle)
        overhead(folder, args.fast_points, args.repeats)
        if args.memory_points:
            memory(folder, args.memory_points, args.memory_samples)


if __name__ == "__main__":
    main()
