"""A virtual lab served by ``labrun sim serve`` in its own process, for the benchmarks that time
labrun against it (its CPU is then not the measured process's)."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path


def serve(folder: Path, time_scale: float = 0.0) -> tuple[subprocess.Popen, Path]:
    """Start the default scenario's lab at ``time_scale``; (process, bench file it wrote)."""
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
    time.sleep(0.2)  # the bench file is written just before the servers accept
    return proc, bench
