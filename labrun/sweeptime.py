"""The OSA's sweep time as measured by ``labrun probe --sweep-time``, and its place in the bench.

``labrun check`` estimates a night from the OSA's sweep time (``fixed_s + points x per_sample_s
+ span / RBW x per_span_rbw_s``, labrun.profiles.SweepTime). A profile's figures are a model's;
the probe times real sweeps (``INIT:IMM`` to the ``*OPC?`` reply, the best of a few) at three
settings that separate the three terms, solves for them, and writes the result into the bench
file as ``[instruments.osa.sweep_time]``, which ``labrun check`` then prefers to the profile's.
Only the OSA's own settings change, and they are put back afterwards; no source is touched.
"""

from __future__ import annotations

import re
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from labrun.errors import InputError

SPAN_NM = 10.0  # the probe's span, and the two resolutions and sample counts it times
RBW_NM = (0.1, 0.05)
POINTS = (1001, 5001)
REPEATS = 2  # the best of this many sweeps per setting (a busy host only adds time)


@dataclass(frozen=True)
class SweepTiming:
    """One timed setting: span, RBW, samples and the best sweep time seen (s)."""

    span_nm: float
    rbw_nm: float
    points: int
    seconds: float


def settings(center_nm: float) -> list[tuple[float, float, float, int]]:
    """(centre, span, RBW, points) of the three timed settings: the second differs from the
    first in the samples only, the third in the RBW only."""
    return [(center_nm, SPAN_NM, RBW_NM[0], POINTS[0]), (center_nm, SPAN_NM, RBW_NM[0], POINTS[1]),
            (center_nm, SPAN_NM, RBW_NM[1], POINTS[0])]


def solve(timings: list[SweepTiming]) -> dict[str, float]:
    """fixed_s, per_sample_s and per_span_rbw_s from the three timings of ``settings`` (a
    term the timings show as negative, within their noise, is 0)."""
    a, b, c = timings
    per_sample = max(0.0, (b.seconds - a.seconds) / (b.points - a.points))
    ratio_a, ratio_c = a.span_nm / a.rbw_nm, c.span_nm / c.rbw_nm
    per_span_rbw = max(0.0, (c.seconds - a.seconds) / (ratio_c - ratio_a))
    fixed = max(0.0, a.seconds - a.points * per_sample - ratio_a * per_span_rbw)
    return {"fixed_s": round(fixed, 6), "per_sample_s": float(f"{per_sample:.4g}"),
            "per_span_rbw_s": float(f"{per_span_rbw:.4g}")}


def measure(osa: Any, *, repeats: int = REPEATS) -> tuple[dict[str, float], list[SweepTiming]]:
    """Time sweeps of an open OSA adapter at the three settings; (the solved model, the
    timings). The OSA's centre, span, RBW and samples are put back afterwards."""
    before = osa.settings()
    timings: list[SweepTiming] = []
    try:
        for center, span, rbw, points in settings(float(before["center_nm"])):
            osa.configure(center, span, rbw, points)
            best = float("inf")
            for _ in range(max(1, repeats)):
                t0 = time.perf_counter()
                osa.sweep()
                best = min(best, time.perf_counter() - t0)
            timings.append(SweepTiming(span, rbw, points, best))
    finally:
        osa.configure(float(before["center_nm"]), float(before["span_nm"]),
                      float(before["rbw_nm"]), int(before["points"]))
    return solve(timings), timings


_HEADER = re.compile(r"^\s*\[instruments\.osa\.sweep_time\]\s*(#.*)?$")
_ANY_HEADER = re.compile(r"^\s*\[")


def bench_text_with(text: str, model: dict[str, float], note: str) -> str:
    """The bench file's text with ``[instruments.osa.sweep_time]`` set to ``model``: the table
    replaced where it is, else appended; every other line is kept as it was."""
    table = [f"# {note}", "[instruments.osa.sweep_time]",
             *(f"{k} = {v!r}" for k, v in model.items())]
    lines = text.splitlines()
    for i, line in enumerate(lines):
        if _HEADER.match(line):
            end = next((j for j in range(i + 1, len(lines)) if _ANY_HEADER.match(lines[j])),
                       len(lines))
            start = i - 1 if i > 0 and lines[i - 1].startswith("# measured by labrun probe") \
                else i
            return "\n".join(lines[:start] + table + [""] + lines[end:]).rstrip("\n") + "\n"
    return text.rstrip("\n") + "\n\n" + "\n".join(table) + "\n"


def store(bench_path: Path, model: dict[str, float], idn: str) -> None:
    """Write ``model`` into the bench file; the file is left as it was when the result would
    not load (an inline ``instruments.osa`` table cannot take a sub-table: InputError, exit 2)."""
    from labrun.bench import parse_bench

    old = bench_path.read_text(encoding="utf-8")
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    new = bench_text_with(old, model, f"measured by labrun probe --sweep-time on {when} "
                                      f"({idn.strip() or 'OSA'})")
    try:
        parse_bench(new, bench_path)
    except InputError as exc:
        raise InputError(f"cannot add [instruments.osa.sweep_time] to this bench ({exc}); add "
                         "it by hand: " + ", ".join(f"{k} = {v!r}" for k, v in model.items()),
                         file=str(bench_path), field="instruments.osa.sweep_time") from None
    bench_path.write_text(new, encoding="utf-8")
