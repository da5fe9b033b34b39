"""Engine benchmark: labrun's own overhead per point, wall time vs instrument time, memory.

Prints figures; asserts nothing (speed targets live here, not in the test suite).

1. Overhead per point at time scale 0 with 20,001-sample traces: wall time per point minus the
   time the (in-process) virtual lab spends executing commands, i.e. commands, transfer,
   parsing, reduction and the commit. Target <= 5 ms. Also printed: labrun's own CPU time per
   point (process time, the unambiguous "own time") and the served lab's CPU time per point
   (its command execution plus its socket handling), and wall minus that. The machine's speed
   drifts, so the run is repeated and the best and the median repeat are shown.
2. Wall time vs instrument-imposed time at a realistic time scale (1.0): imposed = time the
   instruments take to answer (sweeps, *OPC? waits) + settle times the profiles and the plan
   require. Target <= 1.03x.
3. Memory over many points: labrun's resident set size and traced Python heap, sampled as
   points are stored, with the virtual lab in its own process (an in-process lab's server
   threads and trace synthesis used to be counted as labrun's growth). Target: flat.

    python benchmarks/bench_engine.py [--points 200] [--repeats 5] [--memory-points 2000]
                                      [--realistic 6]
"""

from __future__ import annotations

import argparse
import functools
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import labrun.reduce
from labrun.bench import load_bench
from labrun.engine import Runner, run_plan
from labrun.instruments.base import Adapter
from labrun.plan import load_plan
from labrun.scpi import ScpiSession
from labrun.store import Store, open_store
from labrun.vlab.lab import VirtualLab

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


class Meter:
    """Accumulates seconds spent inside wrapped callables, by label."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self.calls: dict[str, int] = {}
        self._undo: list[Callable[[], None]] = []

    def wrap(self, owner: Any, name: str, label: str) -> None:
        """Time every call of owner.name (a module, class or instance attribute)."""
        original = getattr(owner, name)

        @functools.wraps(original)
        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                self.seconds[label] = self.seconds.get(label, 0.0) + time.perf_counter() - t0
                self.calls[label] = self.calls.get(label, 0) + 1

        setattr(owner, name, timed)
        self._undo.append(lambda: setattr(owner, name, original))

    def restore(self) -> None:
        """Undo every wrap."""
        for undo in reversed(self._undo):
            undo()
        self._undo.clear()


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


def _run(folder: Path, lab: VirtualLab, n: int, samples: int, settle: float,
         meter: Meter) -> tuple[float, int]:
    """One unattended run; (wall seconds of run_plan, points stored)."""
    plan_path = folder / f"plan-{n}-{samples}.toml"
    plan_path.write_text(_plan_text(n, samples, settle))
    bench = load_bench(lab.write_bench(folder / "bench.toml"))
    store = open_store(folder / f"bench-{time.monotonic_ns()}.db")
    for inst in lab.instruments.values():  # instrument time: the lab executing commands
        meter.wrap(inst, "execute", "instrument")
    t0 = time.perf_counter()
    out = run_plan(load_plan(plan_path), bench, store, operator="benchmark", unattended=True,
                   ack_safety=True, progress=False)
    wall = time.perf_counter() - t0
    store.close()
    if out.status != "completed":
        raise SystemExit(f"benchmark run ended {out.status}: {out.reason}")
    return wall, out.points_done


def _serve(folder: Path, time_scale: float) -> tuple[subprocess.Popen, Path]:
    """``labrun sim serve`` in its own process (its CPU is not labrun's); (process, bench)."""
    bench = folder / f"served-{time.monotonic_ns()}.toml"
    proc = subprocess.Popen([sys.executable, "-m", "labrun", "sim", "serve", "--scenario",
                             "default-scenario.toml", "--bench-out", str(bench),
                             "--time-scale", str(time_scale)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    t0 = time.monotonic()
    while not bench.exists() or not bench.read_text().strip():
        if proc.poll() is not None or time.monotonic() - t0 > 60:
            raise SystemExit("labrun sim serve did not start")
        time.sleep(0.05)
    time.sleep(0.2)
    return proc, bench


def _lab_time_per_point(samples: int, n: int = 50) -> float:
    """Seconds the virtual lab itself spends per point (sweep + REAL,32 y block + the setting
    commands), measured by calling its command interpreter directly, without sockets."""
    with VirtualLab("default-scenario.toml", time_scale=0.0) as lab:
        osa, att = lab.instruments["osa"], lab.instruments["attenuator_a"]
        for cmd in ("FORM:DATA REAL,32", "FORM:BORD SWAP", "SENS:WAV:CENT 1549.6",
                    "SENS:WAV:SPAN 4.0", "SENS:BAND:RES 0.02", f"SENS:SWE:POIN {samples}"):
            osa.execute(cmd)
        for role in ("laser_a", "laser_b"):
            lab.instruments[role].execute("OUTP:STAT ON")
        t0 = time.perf_counter()
        for i in range(n):
            att.execute(f"INP:ATT {10 + i * 0.01:.3f}")
            osa.execute("INIT:IMM")
            osa.execute("*OPC?")
            osa.execute("TRAC:DATA:Y?")
        return (time.perf_counter() - t0) / n


def _cpu_s(pid: int) -> float | None:
    """User + system CPU seconds of another process (Linux /proc; None elsewhere)."""
    import os

    try:
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, IndexError, ValueError):
        return None


def overhead(folder: Path, n: int, repeats: int = 5) -> None:
    """Figure 1: labrun's own time per point at time scale 0, 20,001-sample traces."""
    meter = Meter()
    meter.wrap(labrun.reduce, "reduce_trace", "reduction")
    meter.wrap(Store, "add_point", "commit")
    meter.wrap(ScpiSession, "_read_block", "trace_read")  # block transfer and decoding
    proc, bench = _serve(folder, 0.0)
    rows: list[tuple[float, float, float | None, dict[str, float]]] = []
    try:
        _run_bench(folder, bench, 3, 20001, Meter())  # warm-up
        for _ in range(max(1, repeats)):
            meter.seconds.clear()
            cpu0, lab0 = time.process_time(), _cpu_s(proc.pid)
            wall, done = _run_bench(folder, bench, n, 20001, meter)
            cpu, lab1 = time.process_time() - cpu0, _cpu_s(proc.pid)
            served = None if lab0 is None or lab1 is None else (lab1 - lab0) / done
            rows.append((wall / done, cpu / done, served,
                         {k: v / done for k, v in meter.seconds.items()}))
    finally:
        meter.restore()
        proc.terminate()
        proc.wait(timeout=30)
    lab = _lab_time_per_point(20001)
    rows.sort(key=lambda r: r[0])
    print(f"[1] time scale 0, 20,001-sample traces, {n} points x {len(rows)} repeats, virtual lab "
          "in its own process (best repeat | median repeat)")

    def show(label: str, values: list[float | None], note: str = "") -> None:
        got = [v for v in values if v is not None]
        if got:
            print(f"    {label:<30}{1e3 * got[0]:7.2f} |{1e3 * statistics.median(got):6.2f} ms"
                  f"{note}")

    show("wall per point", [r[0] for r in rows], "  (run_plan total / points)")
    print(f"    virtual lab's own work        {1e3 * lab:7.2f} ms (sweep synthesis, y block; "
          "measured without sockets)")
    show("labrun overhead per point", [r[0] - lab for r in rows], "  (target <= 5 ms)")
    for label in ("trace_read", "reduction", "commit"):
        show(f"  of which {label}", [r[3].get(label, 0.0) for r in rows])
    show("labrun CPU time per point", [r[1] for r in rows], "  (process time: labrun's own work)")
    show("served lab CPU per point", [r[2] for r in rows], "  (commands + its socket handling)")
    if all(r[2] is not None for r in rows):
        show("wall minus served lab CPU", [r[0] - r[2] for r in rows])  # type: ignore[operator]


def _run_bench(folder: Path, bench_path: Path, n: int, samples: int,
               meter: Meter) -> tuple[float, int]:
    """One unattended run on a served bench; (wall seconds of run_plan, points stored)."""
    plan_path = folder / f"plan-{n}-{samples}.toml"
    plan_path.write_text(_plan_text(n, samples, 0.0))
    store = open_store(folder / f"bench-{time.monotonic_ns()}.db")
    t0 = time.perf_counter()
    out = run_plan(load_plan(plan_path), load_bench(bench_path), store, operator="benchmark",
                   unattended=True, ack_safety=True, progress=False)
    wall = time.perf_counter() - t0
    store.close()
    if out.status != "completed":
        raise SystemExit(f"benchmark run ended {out.status}: {out.reason}")
    return wall, out.points_done


def realistic(folder: Path, n: int, time_scale: float) -> None:
    """Figure 2: wall time against the time the instruments and settle times impose."""
    meter = Meter()
    meter.wrap(Adapter, "settle", "settle")  # profile settle times (sleeps in the adapters)
    meter.wrap(Runner, "wait_until", "plan_settle")  # plan axis settle times
    try:
        with VirtualLab("default-scenario.toml", time_scale=time_scale) as lab:
            wall, done = _run(folder, lab, n, 20001, 0.3, meter)
    finally:
        meter.restore()
    imposed = sum(meter.seconds.get(k, 0.0) for k in ("instrument", "settle", "plan_settle"))
    print(f"[2] time scale {time_scale:g}, {done} points, 0.3 s plan settle per power step")
    print(f"    wall {wall:8.2f} s, instrument-imposed {imposed:8.2f} s "
          f"(instruments {meter.seconds.get('instrument', 0.0):.2f} s, profile settles "
          f"{meter.seconds.get('settle', 0.0):.2f} s, plan settles "
          f"{meter.seconds.get('plan_settle', 0.0):.2f} s)")
    print(f"    ratio {wall / imposed:8.4f}x   (target <= 1.03x)")


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
    proc, bench = _serve(folder, 0.0)

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
        _run_bench(folder, bench, n, samples, Meter())
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
    """Run the three figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=200, help="points for figure 1")
    ap.add_argument("--repeats", type=int, default=5, help="repeats of figure 1")
    ap.add_argument("--realistic", type=int, default=6, help="points for figure 2")
    ap.add_argument("--time-scale", type=float, default=1.0, help="time scale of figure 2")
    ap.add_argument("--memory-points", type=int, default=2000, help="points for figure 3 "
                    "(the issue's 20,000 takes several minutes)")
    ap.add_argument("--memory-samples", type=int, default=20001, help="trace samples, figure 3")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        overhead(folder, args.points, args.repeats)
        realistic(folder, args.realistic, args.time_scale)
        memory(folder, args.memory_points, args.memory_samples)


if __name__ == "__main__":
    main()
