"""``labrun probe``: check that every instrument on a bench answers, without changing anything.

For each role: connect, read ``*IDN?``, run every read-only operation its profile maps (and read
the error queue). Nothing is set and emission is never enabled; the only commands written are
the profile's init commands (``*CLS``) and, for an OSA, the trace transfer format.
Exit 0 when every check passed, 1 when an instrument failed one, 2 on bad input.
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labrun.cli import add_traffic_log_option
from labrun.errors import InputError, LabrunError

if TYPE_CHECKING:  # imported where used: `labrun --help` loads no numpy or pyvisa
    from labrun.bench import Bench
    from labrun.instruments import Adapter
    from labrun.profiles import Operation
    from labrun.trafficlog import TrafficLog


@dataclass
class Check:
    """One probe check: an operation, whether it passed, and what it read or why it failed."""

    operation: str
    ok: bool
    detail: str


@dataclass
class ProbeResult:
    """Everything probed on one instrument."""

    role: str
    resource: str
    idn: str = ""
    checks: list[Check] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return bool(self.checks) and all(c.ok for c in self.checks)


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``labrun probe``."""
    p = subparsers.add_parser("probe", help="check that every instrument of a bench answers",
                              description="Open each instrument of a bench, read its identity "
                                          "and every read-only operation of its profile. "
                                          "Never enables emission; sets nothing but, with "
                                          "--sweep-time, the OSA's own settings (put back "
                                          "afterwards).")
    p.add_argument("--bench", required=True, metavar="FILE", help="bench file (TOML)")
    p.add_argument("--sweep-time", action="store_true",
                   help="also time the OSA's sweeps and store the result in the bench file "
                        "([instruments.osa.sweep_time]), which labrun check then uses")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    add_traffic_log_option(p, "save the instrument traffic as JSON lines")
    p.set_defaults(func=run_probe)


def describe(op: Operation, value: Any) -> str:
    """A short human reading of a value returned by a read operation."""
    import numpy as np

    from labrun.scpi import Idn

    if isinstance(value, Idn):
        return str(value)
    if isinstance(value, np.ndarray):
        if value.size == 0:
            return "0 points"
        unit = f" {op.unit}" if op.unit else ""
        return f"{value.size} points, {value.min():.6g}..{value.max():.6g}{unit}"
    if isinstance(value, bool):
        if op.name == "read_interlock":
            return "closed" if value else "open"
        return "on" if value else "off"
    if isinstance(value, tuple):
        return "(" + ", ".join(f"{v:.6g}" for v in value) + ")"
    if isinstance(value, float):
        return f"{value:.6g}" + (f" {op.unit}" if op.unit else "")
    return str(value)


# Plausible optical power levels, dBm (common practice: below -120 dBm lies under any power
# meter's or OSA's noise floor, above +40 dBm (10 W) no bench of this kind delivers light).
PLAUSIBLE_DBM = (-120.0, 40.0)
# A trace's peak must lie in this range (a trace floor may read lower, its peak not).
PLAUSIBLE_PEAK_DBM = (-150.0, 40.0)


def axis_doubt(band: tuple[float, float] | None, value: Any, seen: dict[str, Any]
               ) -> str | None:
    """Why a wavelength axis (nm) cannot be right, or None: finite, never decreasing and
    rising from first to last (an integer axis in pm repeats values),
    as many samples as ``read_points`` says, within the band (plus 100 nm)."""
    import numpy as np

    x = np.asarray(value, dtype=float)
    if x.size < 2 or not np.all(np.isfinite(x)) or not np.all(np.diff(x) >= 0) \
            or not x[0] < x[-1]:
        return "the wavelength axis is not increasing finite numbers"
    points = seen.get("read_points")
    if isinstance(points, int) and x.size != points:
        return f"the axis has {x.size} samples, read_points says {points}"
    if band is not None and (x[0] < band[0] - 100 or x[-1] > band[1] + 100):
        return (f"the axis {x[0]:.6g}..{x[-1]:.6g} nm lies outside the band "
                f"{band[0]:g}..{band[1]:g} nm (wrong unit?)")
    return None


def implausible(profile: Any, op: Operation, value: Any, seen: dict[str, Any]) -> str | None:
    """Why a value read by ``op`` cannot be right (wrong unit or form), or None when it can."""
    import numpy as np

    band = profile.band()
    if op.name == "read_trace_x":
        return axis_doubt(band, value, seen)
    if op.name == "read_trace_y":
        y = np.asarray(value, dtype=float)
        axis = seen.get("read_trace_x")
        if axis is not None and np.asarray(axis).size != y.size:
            return f"the level trace has {y.size} samples, the axis {np.asarray(axis).size}"
        if y.size == 0 or not np.all(np.isfinite(y)):
            return "the level trace holds non-finite values"
        lo, hi = PLAUSIBLE_PEAK_DBM
        if not lo <= float(y.max()) <= hi:
            return f"the trace peak {float(y.max()):.6g} dBm is outside {lo:g}..{hi:g} dBm " \
                   "(wrong unit?)"
        return None
    if not isinstance(value, float):
        return None
    if op.unit == "nm" and "wavelength" in op.name and band is not None and \
            not band[0] <= value <= band[1]:
        return f"{value:.6g} nm lies outside the band {band[0]:g}..{band[1]:g} nm (wrong unit?)"
    if op.unit == "dBm" and not PLAUSIBLE_DBM[0] <= value <= PLAUSIBLE_DBM[1]:
        return f"{value:.6g} dBm is not a plausible level ({PLAUSIBLE_DBM[0]:g}.." \
               f"{PLAUSIBLE_DBM[1]:g} dBm; wrong unit?)"
    for setting in profile.operations.values():
        if setting.readback == op.name and setting.range is not None and \
                op.index_range is None and not setting.range[0] <= value <= setting.range[1]:
            return (f"{value:.6g} lies outside {setting.name}'s range "
                    f"[{setting.range[0]:g}, {setting.range[1]:g}] (wrong unit?)")
    return None


def _check_operation(adapter: Adapter, op: Operation, seen: dict[str, Any]) -> Check:
    """Run one read operation (every index of an indexed one) and judge the values read;
    NoAnswerError propagates."""
    from labrun.scpi import NoAnswerError

    try:
        if op.index_range is None:
            value = adapter.read(op.name)
            seen[op.name] = value
            detail = describe(op, value)
            reason = implausible(adapter.profile, op, value, seen)
        else:
            lo, hi = op.index_range
            values = {i: adapter.read(op.name, index=i) for i in range(lo, hi + 1)}
            detail = ", ".join(f"{i}: {describe(op, v)}" for i, v in values.items())
            reason = next((r for v in values.values()
                           if (r := implausible(adapter.profile, op, v, seen))), None)
    except NoAnswerError:
        raise
    except LabrunError as exc:
        return Check(op.name, False, str(exc))
    if reason is not None:
        return Check(op.name, False, f"{detail}: {reason}")
    return Check(op.name, True, detail)


def probe_instrument(bench: Bench, role: str, traffic_log: TrafficLog | None = None) -> ProbeResult:
    """Probe one role; an instrument that does not answer yields one failed check, no more."""
    from labrun.instruments import open_instrument
    from labrun.scpi import NoAnswerError

    spec = bench.instruments[role]
    result = ProbeResult(role=role, resource=spec.resource)
    try:
        adapter = open_instrument(bench, role, traffic_log=traffic_log)
    except InputError:
        raise
    except LabrunError as exc:
        result.checks.append(Check("connect", False, str(exc)))
        return result
    try:
        try:
            result.idn = str(adapter.idn())
            result.checks.append(Check("identify", bool(result.idn.strip(",")), result.idn))
        except NoAnswerError:
            raise
        except LabrunError as exc:
            result.checks.append(Check("identify", False, str(exc)))
        forms = spec.profile.replies.declared()
        if forms:
            result.checks.append(Check("reply_forms", True, "; ".join(
                f"{kind}: {text}" for kind, text in forms.items())))
        seen: dict[str, Any] = {}
        for op in spec.profile.read_operations():
            if op.name != "identify":
                result.checks.append(_check_operation(adapter, op, seen))
        trace = spec.profile.trace
        if trace is not None and trace.axis_needs_no_query:
            result.checks.append(_check_derived_axis(adapter, seen))
        if spec.profile.error_query:
            result.checks.append(_check_error_queue(adapter))
        else:
            result.checks.append(Check("error_queue", True, "not checked: the profile declares "
                                                            "error_queue = false"))
    except NoAnswerError as exc:
        result.checks.append(Check("answer", False, str(exc)))
    finally:
        adapter.close()
    return result


def _check_derived_axis(adapter: Any, seen: dict[str, Any]) -> Check:
    """The axis of an OSA without an axis query (from its start and stop queries, or its
    centre and span), as many samples as the level trace read, judged as ``read_trace_x``."""
    import numpy as np

    from labrun.scpi import NoAnswerError

    y = seen.get("read_trace_y")
    n = int(np.asarray(y).size) if y is not None else seen.get("read_points")
    if not isinstance(n, int) or n < 2:
        return Check("trace_axis", False, "no level trace or point count to size the axis")
    try:
        from_settings = adapter.profile.trace.axis_from_settings
        x = adapter.axis_from_settings(n) if from_settings else adapter.axis_from_start_stop(n)
    except NoAnswerError:
        raise
    except LabrunError as exc:
        return Check("trace_axis", False, str(exc))
    source = "centre and span" if from_settings else "start/stop queries"
    detail = f"{x.size} points, {x.min():.6g}..{x.max():.6g} nm ({source})"
    reason = axis_doubt(adapter.profile.band(), x, seen)
    return Check("trace_axis", reason is None, detail if reason is None else
                 f"{detail}: {reason}")


def _check_error_queue(adapter: Adapter) -> Check:
    """Read the error queue: empty means every probe query was understood."""
    from labrun.scpi import NoAnswerError

    try:
        adapter.session.drain_errors("the probe's queries")
    except NoAnswerError:
        raise
    except LabrunError as exc:
        return Check("error_queue", False, str(exc))
    return Check("error_queue", True, "empty")


def probe_bench(bench: Bench, traffic_log: TrafficLog | None = None) -> list[ProbeResult]:
    """Probe every instrument of a bench, in file order."""
    return [probe_instrument(bench, role, traffic_log) for role in bench.instruments]


def format_table(results: list[ProbeResult]) -> str:
    """Human-readable report: one header line per instrument, one line per check."""
    lines: list[str] = []
    for r in results:
        if not r.idn and not r.ok:  # did not answer: one line says why
            lines.append(f"{r.role:<15} {'FAILED':<6} {r.checks[-1].detail}")
            continue
        status = "ok" if r.ok else "FAILED"
        lines.append(f"{r.role:<15} {status:<6} {r.resource}  {r.idn}")
        for c in r.checks:
            mark = "ok" if c.ok else "FAIL"
            lines.append(f"{'':<15} {mark:<6} {c.operation:<20} {c.detail}")
    failed = [r.role for r in results if not r.ok]
    lines.append(f"{len(results)} instruments, "
                 + ("all checks ok" if not failed else f"failed: {', '.join(failed)}"))
    return "\n".join(lines)


def run_probe(args: argparse.Namespace) -> int:
    """Entry point of ``labrun probe``."""
    from labrun.bench import load_bench
    from labrun.trafficlog import TrafficLog

    bench = load_bench(args.bench)
    if args.traffic_log and not Path(args.traffic_log).resolve().parent.is_dir():
        raise InputError("no such folder for the traffic log", file=args.traffic_log,
                         field="--traffic-log")
    if args.sweep_time and "osa" not in bench.instruments:
        raise InputError("--sweep-time needs an osa on the bench", file=str(bench.path),
                         field="instruments.osa")
    traffic_log = TrafficLog()
    results = probe_bench(bench, traffic_log)
    sweep: dict[str, Any] | None = None
    if args.sweep_time and all(r.ok for r in results if r.role == "osa"):
        sweep = measure_sweep_time(bench, traffic_log)
    if args.traffic_log:
        traffic_log.save(args.traffic_log)
    if args.json:
        payload: dict[str, Any] = {
            "bench": str(bench.path), "ok": all(r.ok for r in results),
            "instruments": [{"role": r.role, "resource": r.resource, "idn": r.idn,
                             "checks": [asdict(c) for c in r.checks]} for r in results]}
        if args.sweep_time:
            payload["sweep_time"] = sweep
        json.dump(payload, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(format_table(results))
        if sweep is not None:
            print(format_sweep(sweep))
        elif args.sweep_time:
            print("osa sweep time: not measured (the osa failed its checks)")
    return 0 if all(r.ok for r in results) and (sweep is not None or not args.sweep_time) else 1


def measure_sweep_time(bench: Bench, traffic_log: TrafficLog | None) -> dict[str, Any]:
    """Time the OSA's sweeps (labrun/sweeptime.py) and store the model in the bench file; what
    was measured and stored, for the report."""
    from labrun import sweeptime
    from labrun.instruments import open_instrument

    osa = open_instrument(bench, "osa", traffic_log=traffic_log)
    try:
        idn = str(osa.idn())
        model, timings = sweeptime.measure(osa)
    finally:
        osa.close()
    sweeptime.store(bench.path, model, idn)
    return {"model": model, "stored_in": str(bench.path),
            "timings": [asdict(t) for t in timings]}


def format_sweep(sweep: dict[str, Any]) -> str:
    """The sweep-time lines of the table report."""
    m = sweep["model"]
    rows = [f"osa sweep time: {m['fixed_s']:.4g} s + points x {m['per_sample_s']:.4g} s + "
            f"span/RBW x {m['per_span_rbw_s']:.4g} s (stored in {sweep['stored_in']})"]
    rows += [f"{'':<15} {t['points']:>6} samples, span {t['span_nm']:g} nm, RBW "
             f"{t['rbw_nm']:g} nm: {t['seconds']:.3f} s" for t in sweep["timings"]]
    return "\n".join(rows)
