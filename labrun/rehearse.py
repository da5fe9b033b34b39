"""A run rehearsed without instruments: the engine's own point loop on a simulated clock.

``labrun check`` does not re-implement the run: ``rehearse`` drives the engine's ``Runner`` (the
same settings, the same set-wait-read order, the same switch-on and emission watch) against a
pyvisa backend that records instead of sending (``DryRunLibrary``). Its instruments take every
message and answer from what was set on them (a query ``X?`` answers the value last written with
``X``), report no error, a closed interlock and outputs off until switched on, and show the OSA
trace as an empty floor. Its clock only moves when the engine waits or an OSA sweeps (the sweep
time comes from the OSA profile's ``sweep_time`` or from the plan's rough model), so the time it
reaches is the run's duration as the instruments impose it, and the traffic log it fills holds
the messages the run sends. The whole run is rehearsed, not only its points: opening the bench
(connects, identification, init, error queues), the points, and the final safe-off the run ends
with (each role's own steps and stated settle times; the roles go dark in parallel, so the
longest counts). Nothing is reduced and nothing is stored.
"""

from __future__ import annotations

import contextlib
import dataclasses
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from pyvisa import constants
from pyvisa.typing import VISASession

from labrun.blockframe import build_block
from labrun.engine import Captured, RetryPolicy, Runner, Seams
from labrun.plan import Plan, PointSpec
from labrun.trafficlog import TrafficLog, TrafficLogEntry, split_units
from labrun.visareplay import ReplayScript, ReplaySession, TrafficReplayLibrary

if TYPE_CHECKING:
    from labrun.bench import Bench

FLOOR_DBM = -90.0  # what the simulated OSA shows: no light reaches it (invented, below any floor)


class SimClock:
    """A clock that moves only when told to: the engine's waits and the OSA's sweeps."""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        """The engine waits: the simulated time passes at once."""
        self.now += max(0.0, float(seconds))


def _literal(pattern: str | None) -> str | None:
    """The text a plain ``done`` pattern stands for ('0', 'IDLE'), None for a real pattern."""
    if pattern is None or not re.fullmatch(r"[\w+.-]*", pattern):
        return None
    return pattern if re.fullmatch(pattern, pattern) else None


def rehearsal_profile(profile: Any) -> Any:
    """``profile`` as the rehearsal's instruments answer it: generic reply forms (they answer
    ``0,"No error"``, bare numbers, 1/0), and a poll whose ``done`` is a real pattern (which
    they cannot answer) replaced by no wait; every command the run sends stays the same."""
    from labrun.profiles import CompletionSpec, ReplyForms

    changes: dict[str, Any] = {"replies": ReplyForms()}
    done = profile.completion
    if done.method == "poll" and _literal(done.done) is None:
        changes["completion"] = CompletionSpec(method="fixed", fixed_s=0.0)
    return dataclasses.replace(profile, **changes)


def rehearsal_bench(bench: Bench) -> Any:
    """``bench`` with every profile as the rehearsal answers it (``rehearsal_profile``)."""
    return dataclasses.replace(bench, instruments={
        role: dataclasses.replace(spec, profile=rehearsal_profile(spec.profile))
        for role, spec in bench.instruments.items()})


def _header(template: str | None) -> str:
    """The program header of a command template or query (``SOUR:POW {value}`` -> SOUR:POW)."""
    return (template or "").strip().lstrip(":").split(" ", 1)[0].upper()


@dataclass
class _Instrument:
    """What one simulated instrument knows: its profile, role and the values set on it."""

    role: str
    profile: Any
    values: dict[str, str] = field(default_factory=dict)


class DryRunLibrary(TrafficReplayLibrary):
    """pyvisa backend of a rehearsal: takes every message, answers from what was set."""

    instruments: dict[str, _Instrument]
    clock: SimClock
    sweep_s: float

    @classmethod
    def for_bench(cls, bench: Bench, clock: SimClock, sweep_s: float) -> DryRunLibrary:
        """A fresh library simulating every instrument of ``bench``."""
        lib = cls.from_entries([])
        lib.instruments = {spec.resource: _Instrument(role, spec.profile)
                           for role, spec in bench.instruments.items()}
        lib.clock, lib.sweep_s = clock, float(sweep_s)
        return lib

    @staticmethod
    def get_debug_info() -> dict[str, str]:
        """What pyvisa-info shows for this backend."""
        return {"backend": "labrun check rehearsal"}

    def open(self, session: int, resource_name: str,
             access_mode: constants.AccessModes = constants.AccessModes.no_lock,
             open_timeout: int = constants.VI_TMO_IMMEDIATE
             ) -> tuple[VISASession, constants.StatusCode]:
        """Open one of the bench's resources (anything else is not found)."""
        inst = self.instruments.get(resource_name)
        if inst is None:
            return VISASession(0), constants.StatusCode.error_resource_not_found
        attrs: dict[int, Any] = {constants.ResourceAttribute.termchar: ord("\n"),
                 constants.ResourceAttribute.termchar_enabled: constants.VI_FALSE,
                 constants.ResourceAttribute.timeout_value: 2000}
        return (self._register(ReplaySession(ReplayScript(resource_name, inst.role), attrs=attrs)),
                constants.StatusCode.success)

    def write(self, session: int, data: bytes) -> tuple[int, constants.StatusCode]:
        """Take a message: settings are remembered, queries answered in one response."""
        sess = self.sessions.get(session)
        if not isinstance(sess, ReplaySession):
            return 0, constants.StatusCode.error_invalid_object
        inst = self.instruments[sess.script.resource]
        text = data.decode("ascii", "replace").rstrip("\r\n")
        term = bytes([int(sess.attrs.get(constants.ResourceAttribute.termchar, 10))])
        sess.pending.clear()
        replies = [self._unit(inst, unit) for unit in split_units(text) if unit]
        answers = [r for r in replies if r is not None]
        if answers:
            sess.pending += b";".join(answers) + term
        return len(data), constants.StatusCode.success

    def _unit(self, inst: _Instrument, unit: str) -> bytes | None:
        """Carry out one program message unit; its response unit (None for a setting)."""
        header, _, arg = unit.strip().lstrip(":").partition(" ")
        header = header.upper()
        if not header.endswith("?"):
            inst.values[header] = arg.strip()
            if inst.profile.has("sweep") and header == _header(inst.profile.op("sweep").template):
                self.clock.sleep(self.sweep_s)
            return None
        return self._query(inst, header, arg.strip())

    def _query(self, inst: _Instrument, header: str, arg: str) -> bytes:
        """The answer to one query (a trace as a block or values, the rest as text)."""
        prof = inst.profile
        full = f"{header} {arg.upper()}".strip()
        for name in ("read_trace_x", "read_trace_y"):
            if prof.has(name) and full == prof.op(name).render().strip().lstrip(":").upper():
                return self._trace(inst, x_axis=name == "read_trace_x")
        if header == "*IDN?":
            return f"LABRUN-CHECK,REHEARSAL,{inst.role},0".encode()
        if header == "*OPC?":
            return b"1"
        done = prof.completion
        if done.query and header == _header(done.query):  # the operation is done at once
            if done.method == "poll":
                return (_literal(done.done) or "").encode()
            if done.method == "stb":
                return str(done.mask).encode()
        trace = prof.trace
        if trace is not None and trace.axis_from_start_stop and header in (
                _header(trace.axis_start_query), _header(trace.axis_stop_query)):
            from labrun.wireunits import to_wire

            centre, span = self._setting(inst, "set_center_nm"), self._setting(inst, "set_span_nm")
            end = centre + (span if header == _header(trace.axis_stop_query) else -span) / 2
            return f"{float(to_wire(end, 'nm', trace.axis_wire_unit)):.10e}".encode()
        if prof.error_query and header == _header(prof.error_query):
            return b'0,"No error"'
        if prof.has("read_interlock") and header == _header(prof.op("read_interlock").template):
            return b"1"  # closed: emission allowed
        return inst.values.get(header[:-1], "0").encode()

    @staticmethod
    def _setting(inst: _Instrument, name: str) -> float:
        """The value last set by operation ``name``, in labrun's unit (0 before any)."""
        op = inst.profile.op(name)
        return float(op.from_wire(float(inst.values.get(_header(op.template), "0") or 0)))

    def _trace(self, inst: _Instrument, *, x_axis: bool) -> bytes:
        """The configured grid (x) or an empty floor (y), as the transfer format asks (in the
        trace's wire unit; ASCII with the profile's separator and leading count)."""
        prof = inst.profile
        points = max(int(self._setting(inst, "set_points")), 2)
        centre = self._setting(inst, "set_center_nm")
        span = self._setting(inst, "set_span_nm")
        data = (np.linspace(centre - span / 2, centre + span / 2, points) if x_axis
                else np.full(points, FLOOR_DBM))
        data = np.asarray(prof.op("read_trace_x" if x_axis else "read_trace_y").to_wire(data))
        trace = prof.trace
        ascii_set = trace.ascii_command and inst.values.get(_header(trace.ascii_command)) == \
            trace.ascii_command.split(" ", 1)[-1].strip()
        if trace.block_datatype is None or ascii_set:
            head = [str(data.size)] if trace.ascii_leading_count else []
            return trace.ascii_separator.join(head + [f"{v:.6e}" for v in data]).encode()
        order = "<" if trace.byte_order == "little" else ">"
        body = data.astype(order + trace.block_datatype).tobytes()
        return build_block(body)  # IEEE 488.2 definite length


class _NullStore:
    """A rehearsal stores nothing: events and heartbeats go nowhere."""

    def add_event(self, *args: Any, **kwargs: Any) -> None:
        """Nothing is recorded."""

    def heartbeat(self, *args: Any, **kwargs: Any) -> None:
        """Nothing is recorded."""


class _NullGuard:
    """A rehearsal emits nothing: there is nothing to switch off."""

    def set_instruments(self, instruments: Any) -> None:
        """Nothing to guard."""

    def check(self) -> None:
        """No signal handling in a rehearsal."""


class DryRunner(Runner):
    """The engine's Runner on simulated instruments: no reduction (the OSA sees no light)."""

    def __init__(self, plan: Plan, bench: Bench, clock: SimClock, traffic_log: TrafficLog):
        super().__init__(plan, bench, _NullStore(), 0, _NullGuard(),  # type: ignore[arg-type]
                         policy=RetryPolicy(attempts=1), progress=False,
                         traffic_log=traffic_log, seams=Seams(sleep=clock.sleep, clock=clock))
        self.announce_opening = False  # a rehearsal opens no real bench: nothing to start

    def reduce(self, spec: PointSpec, traces: Sequence[Captured]) -> None:
        """Nothing to reduce: the rehearsal's traces are an empty floor."""

    def beat(self, force: bool = False) -> None:
        """No heartbeat: nothing is stored."""

    def darken_bench(self) -> list[str]:
        """Nothing emits in a rehearsal: a fault's safe-off opens no real connection."""
        return []


@dataclass
class PointRehearsal:
    """One rehearsed point: its spec, the traffic entries it sent and its simulated seconds."""

    spec: PointSpec
    entries: list[TrafficLogEntry]
    seconds: float
    sweeps: int


@dataclass
class Rehearsal:
    """A rehearsed run: the opening, every point and the final safe-off (traffic and simulated
    seconds of each); ``total_s`` is the whole run, start to exit."""

    points: list[PointRehearsal]
    opening: list[TrafficLogEntry]
    total_s: float
    sweep_s: float
    sweep_source: str
    traffic_log: TrafficLog
    opening_s: float = 0.0
    finish: list[TrafficLogEntry] = field(default_factory=list)
    finish_s: float = 0.0

    @property
    def sweeps_s(self) -> float:
        """Simulated seconds spent sweeping."""
        return self.sweep_s * sum(p.sweeps for p in self.points)

    @property
    def points_s(self) -> float:
        """Simulated seconds of the point loop."""
        return sum(p.seconds for p in self.points)

    @property
    def fixed_s(self) -> float:
        """Simulated seconds outside the point loop: opening the bench and the final safe-off."""
        return self.opening_s + self.finish_s


def rehearse_safe_off(bench: Bench, instruments: Any, clock: SimClock) -> None:
    """The run's final safe-off (labrun.safe_off.darken_role over the run's own connections) on
    the simulated instruments: every role's steps and settle waits in turn on the clock, which
    then stands at the longest role's end (the run darkens the roles in parallel)."""
    from labrun.roles import OFF_ROLES
    from labrun.safe_off import darken_role

    start, longest = clock(), 0.0
    for role in (r for r in OFF_ROLES if r in bench.instruments):
        own = instruments.get(role) if instruments is not None else None
        if own is not None:
            own.sleep = clock.sleep
        clock.now = start
        problem = darken_role(bench, role, own)
        if problem is not None:
            raise RuntimeError(f"rehearsed safe-off: {problem}")
        longest = max(longest, clock() - start)
    clock.now = start + longest


def sweep_time(plan: Plan, bench: Bench) -> tuple[float, str]:
    """Seconds per OSA sweep at the plan's OSA settings and where the figure comes from: the
    plan's own ``osa.sweep_s``, the bench's measured ``[instruments.osa.sweep_time]`` (labrun
    probe --sweep-time), the OSA profile's ``[trace.sweep_time]``, or a rough guess."""
    from labrun.plan import osa_sweep_model

    seconds = float(plan.osa_settings(bench).sweep_estimate_s)
    if plan.osa.sweep_s is not None:
        return seconds, "plan (osa.sweep_s)"
    if getattr(bench.instruments.get("osa"), "sweep_time", None) is not None:
        return seconds, "bench file (measured by labrun probe)"
    if osa_sweep_model(bench) is not None:
        return seconds, "osa profile"
    return seconds, "rough estimate (no sweep_time in the osa profile)"


def rehearse(plan: Plan, bench: Bench, *, limit: int | None = None) -> Rehearsal:
    """Run ``plan`` on simulated instruments (the first ``limit`` points, or all)."""
    from labrun import scpi

    clock = SimClock()
    log = TrafficLog()
    sweep_s, source = sweep_time(plan, bench)
    bench = rehearsal_bench(bench)
    lib = DryRunLibrary.for_bench(bench, clock, sweep_s)
    specs = plan.points()
    if limit is not None:
        specs = specs[:limit]
    points: list[PointRehearsal] = []
    try:
        with scpi.visa_library_override(lib):
            runner = DryRunner(plan, bench, clock, log)
            try:
                runner.open()
                opening, opening_s = list(log.entries), clock()
                for spec in specs:
                    start, mark = clock(), len(log.entries)
                    traces, _, _ = runner.measure(spec)
                    points.append(PointRehearsal(spec, log.entries[mark:], clock() - start,
                                                 len(traces)))
                start, mark = clock(), len(log.entries)
                rehearse_safe_off(bench, runner.instruments, clock)
                finish, finish_s = log.entries[mark:], clock() - start
            finally:
                with contextlib.suppress(Exception):
                    runner.close()
    finally:
        lib.forget()
    return Rehearsal(points, opening, clock(), sweep_s, source, log, opening_s=opening_s,
                     finish=finish, finish_s=finish_s)


def estimate_per_point(plan: Plan, bench: Bench, points: int = 4) -> float | None:
    """Seconds per point as ``labrun check`` rehearses the first points (after the first, which
    also switches on): the ETA ``labrun status`` shows until points are measured (``labrun run``
    passes it to ``run_plan``). None when the rehearsal fails; an estimate never stops a run."""
    try:
        done = rehearse(plan, bench, limit=points).points
    except Exception:  # noqa: BLE001 - the run itself reports any real problem
        return None
    later = [p.seconds for p in done[1:]] or [p.seconds for p in done]
    return round(sum(later) / len(later), 4) if later else None


def settings_sent(entries: Sequence[TrafficLogEntry]) -> list[tuple[str, str]]:
    """(role, setting) of every setting unit the entries carried, in order (queries left out)."""
    out = []
    for e in entries:
        if e.direction != "write":
            continue
        for unit in split_units(e.text):
            text = unit.strip().lstrip(":")
            if text and not text.split(" ", 1)[0].endswith("?"):
                out.append((e.role or e.resource, text))
    return out
