"""A minimal plain pyvisa measurement script: the yardstick the engine benchmark compares with.

What a careful person writes by hand for the same points on the same instruments: open each
instrument, configure the OSA once (REAL,32 binary traces), then per point write the settings
that changed, sleep the longest settle time of what moved, start a sweep and wait for it with
``*OPC?``, read the y trace as a binary block and append one CSV row (the trace itself goes to a
binary file beside it, as such a script would keep it). No read-backs, no error queue, no
safety checks, no database: only what the instruments need.

The benchmark hands it a table of points (``Step``: per role the SCPI settings, and the wait);
it uses nothing of labrun.
"""

from __future__ import annotations

import csv
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyvisa


@dataclass
class Step:
    """One point: the setting commands per role (only what changed), the sleep before the sweep
    (s), and the values written in the CSV row."""

    commands: dict[str, list[str]]
    wait_s: float
    row: list[float] = field(default_factory=list)


def run(resources: dict[str, str], setup: dict[str, list[str]], steps: list[Step],
        folder: Path, *, sweep: str = "INIT:IMM", trace_y: str = "TRAC:DATA? LEVEL"
        ) -> tuple[float, list[float]]:
    """Measure every step; (seconds from the first setting to the last row, seconds per point).

    ``setup``: commands per role sent once after opening (OSA settings and transfer format,
    switch path); the sources are switched on after the first point's settings. ``sweep`` and
    ``trace_y``: the OSA's sweep command and y-trace query (from its profile).
    """
    rm = pyvisa.ResourceManager("@py")
    inst = {role: rm.open_resource(res, read_termination="\n", write_termination="\n",
                                   timeout=30000) for role, res in resources.items()}
    try:
        for role, cmds in setup.items():
            for cmd in cmds:
                inst[role].write(cmd)
        per_point: list[float] = []
        with (folder / "plain.csv").open("w", newline="") as fh, \
                (folder / "plain-traces.f32").open("wb") as traces:
            out = csv.writer(fh)
            out.writerow(["point", "values", "samples", "peak_dbm"])
            t0 = time.perf_counter()
            for n, step in enumerate(steps):
                start = time.perf_counter()
                for role, cmds in step.commands.items():
                    for cmd in cmds:
                        inst[role].write(cmd)
                if n == 0:
                    for role in ("attenuator_a", "attenuator_b", "laser_a", "laser_b"):
                        inst[role].write("OUTP:STAT ON")
                time.sleep(step.wait_s)
                osa = inst["osa"]
                osa.write(sweep)
                osa.query("*OPC?")
                y = np.asarray(osa.query_binary_values(trace_y, datatype="f", chunk_size=1 << 20,
                                                       container=np.array))
                y.astype(np.float32).tofile(traces)
                out.writerow([n, *step.row, y.size, float(y.max())])
                per_point.append(time.perf_counter() - start)
            total = time.perf_counter() - t0
        for role in ("laser_a", "laser_b", "attenuator_a", "attenuator_b"):
            inst[role].write("OUTP:STAT OFF")
        return total, per_point
    finally:
        for res in inst.values():
            res.close()
