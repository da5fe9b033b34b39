"""The run engine: takes a validated plan and bench through every point, safely, into the store.

``run_plan`` refuses anything unsafe before an instrument is opened (caps, missing
acknowledgement), records the run, then per point: checks every setting, writes them all, waits
once for the longest settle of what moved, reads them all back, sweeps the OSA, reads and
reduces the trace, and commits point, traces and lines in one transaction. Faults are retried
per ``RetryPolicy``; a signal abandons the current point; interlock or an unexpected output
state aborts. Whatever happens, ``SafeOffGuard`` leaves every source off and the attenuators at
maximum. ``resume_run`` continues a run by point key.
"""

from __future__ import annotations

import contextlib
import functools
import inspect
import math
import os
import signal as _signal
import socket
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, is_dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO, cast

from labrun import __version__, emission
from labrun.capture import OSA_SETTINGS as OSA_SETTINGS
from labrun.capture import TRACE_DBM_BOUNDS as TRACE_DBM_BOUNDS
from labrun.capture import Captured, check_tones, check_trace, expected_thz
from labrun.commit import jsonable as _jsonable
from labrun.commit import point_row, postfix, progress_bar
from labrun.errors import InputError, InstrumentError, SafetyError
from labrun.faults import (
    PointOverrun,
    PointWatchdog,
    RetryPolicy,
    darkens,
    point_bound_s,
)
from labrun.instruments import open_bench, source_readings
from labrun.outcomes import RunAborted, StopRequested
from labrun.plan import Plan, PointSpec, StopWatch
from labrun.preload import bench_opening, preload
from labrun.roles import ATTENUATOR_ROLES, LASER_ROLES, SOURCE_ROLES, SWEEP_ROLES
from labrun.runstore import (
    RunStore,
    StoreFault,
    apply_fallback,
    as_run_store,
    describe,
    write_fallback,
)
from labrun.safe_off import darken
from labrun.scpi import NoAnswerError
from labrun.setpoints import targets
from labrun.settle import group_settles, setting_s, wait_s
from labrun.shutdown import RunInterrupted, SafeOffGuard
from labrun.store.kinds import FINISHED_STATUSES, RunStatus
from labrun.trafficlog import EVENT_KIND

if TYPE_CHECKING:
    from labrun.bench import Bench
    from labrun.reduce import Reduction
    from labrun.store import Store  # the engine needs SQLAlchemy only once the store opens

    AnyStore = Store | RunStore  # a store, or one in RunStore's wrapping (retries, darken)

STALE_HEARTBEAT_S = 60.0  # a running run with an older heartbeat is probably dead
SIGINT = int(_signal.SIGINT)  # Ctrl-C; KeyboardInterrupt counts as this signal


@dataclass
class RunOutcome:
    """How a run ended; ``to_dict`` is the ``--json`` output."""

    run_id: int
    status: RunStatus
    points_done: int
    points_total: int
    reason: str | None = None
    db: str | None = None
    safe_off_problems: list[str] = field(default_factory=list)
    signal: int | None = None  # the signal that interrupted the run (2 SIGINT, 15 SIGTERM)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (run_id, status, points_done, points_total, reason, db, ...)."""
        return asdict(self)

    @property
    def exit_code(self) -> int:
        """0 completed/stopped, 128+signal when interrupted, 1 otherwise (or if not all off)."""
        if self.safe_off_problems:
            return 1
        if self.status in FINISHED_STATUSES:
            return 0
        if self.status == RunStatus.INTERRUPTED:
            return 128 + (self.signal or SIGINT)
        return 1


@dataclass(frozen=True)
class Pending:
    """Settings written and not yet verified: the engine settings, the profile settings they
    stand for, the one wait they need (s, scaled) and when it ends (the runner's clock), and
    whether the read-backs already came with the writes."""

    settings: Sequence[Setting]
    planned: Sequence[Any]
    wait_s: float
    deadline: float
    confirmed: bool = False


@dataclass(frozen=True)
class Setting:
    """One instrument setting of a point: adapter method, value, and the plan's settle time (s).

    The engine waits the larger of this and the profile operation's settle time
    (``labrun.settle``), once per point for everything that moved.
    """

    role: str
    method: str
    value: Any
    settle_s: float = 0.0



# ------------------------------------------------------------------------------------------------
# checks before anything is opened
# ------------------------------------------------------------------------------------------------
def preflight(plan: Plan, bench: Bench, *, operator: str | None, unattended: bool,
              ack_safety: bool, confirm: Callable[[str], bool] | None) -> str:
    """Refuse an unsafe or unacknowledged run before any instrument is opened; the safety text.

    Caps (safety.check_caps) -> SafetyError. Unattended without --ack-safety or --operator ->
    InputError. Interactive: ``confirm(text)`` must return True (the operator typed the word).
    """
    from labrun import safety

    require_roles(plan, bench)
    violations = list(safety.check_caps(plan, bench))
    if violations:
        text = "; ".join(str(v) for v in violations)
        raise SafetyError(f"refused, the plan exceeds a power cap: {text}")
    text = safety_text(plan, bench)
    if unattended:
        if not operator:
            raise InputError("an unattended run needs --operator NAME", field="--operator")
        if not ack_safety:
            raise InputError("an unattended run needs --ack-safety (read the cautions with "
                             "'labrun check' first)", field="--ack-safety")
        return text
    if confirm is None or not confirm(text):
        raise SafetyError("emission not confirmed by the operator; nothing was switched on")
    return text


def require_roles(plan: Plan, bench: Bench) -> None:
    """Refuse (InputError, exit 2) a bench that lacks a role the sweep or the plan needs."""
    missing = [r for r in SWEEP_ROLES if r not in bench.instruments]
    if missing:
        raise InputError(f"a sweep needs roles {', '.join(missing)}", file=str(bench.path),
                         field="instruments")
    needs = ((plan.capture_input, "osa.capture_input", "switch", "capture the input spectrum"),
             (plan.amplifier, "plan.amplifier", "amplifier", "use an amplifier"))
    for wanted, where, role, what in needs:
        if wanted and role not in bench.instruments:
            raise InputError(f"the plan asks to {what} but bench {bench.path} has no {role}",
                             file=plan.file, field=where)


def safety_text(plan: Plan, bench: Bench) -> str:
    """Worst case launched power, advisory hazard class and the cautions, for the operator."""
    from labrun import safety

    wc = safety.worst_case(plan, bench)
    return "\n".join([
        f"Worst case: {_describe(wc)}",
        f"Advisory hazard class (IEC 60825-1; your laser safety officer decides): "
        f"{wc.hazard_class}",
        str(safety.CAUTIONS).strip(),
    ])


def _describe(obj: Any) -> str:
    """A one-line rendering of a dataclass-like result."""
    if hasattr(obj, "describe"):
        return str(obj.describe())
    if is_dataclass(obj) and not isinstance(obj, type):
        return ", ".join(f"{k} {v:.2f}" if isinstance(v, float) else f"{k} {v}"
                         for k, v in asdict(obj).items())
    return str(obj)


# ------------------------------------------------------------------------------------------------
# the per-point engine
# ------------------------------------------------------------------------------------------------
def _reduce_trace(*args: Any, **kwargs: Any) -> Any:
    """labrun.reduce.reduce_trace, imported on first use (preloaded while the first point
    settles: scipy takes a while)."""
    from labrun.reduce import reduce_trace

    return reduce_trace(*args, **kwargs)


@dataclass(frozen=True)
class Seams:
    """What a run calls outside the engine: how the bench opens, how the sources' states are
    read, how a trace is reduced, how long an attempt at a point may take (the watchdog's
    bound) and the watchdog that holds it to that, the clock, the sleep, and the safe-off guard
    of the run (made from the bench). The defaults are the real ones; tests pass their own."""

    open_bench: Callable[..., Any] = open_bench
    source_readings: Callable[..., Any] = source_readings
    reduce_trace: Callable[..., Any] = _reduce_trace
    point_bound_s: Callable[[float, int, Any], float] = point_bound_s
    watchdog: Callable[[float, Callable[[], None]], PointWatchdog] = PointWatchdog
    clock: Callable[[], float] = time.monotonic
    sleep: Callable[[float], None] = time.sleep
    guard: Callable[[Any], SafeOffGuard] = SafeOffGuard


class Runner:
    """Runs points of one run: owns the connections, the applied-state cache and the guard."""

    def __init__(self, plan: Plan, bench: Bench, store: AnyStore, run_id: int | None,
                 guard: SafeOffGuard, *, policy: RetryPolicy, progress: bool = True,
                 traffic_log: Any = None, seams: Seams | None = None):
        self.plan, self.bench, self.store, self.run_id = plan, bench, store, run_id
        seams = seams or Seams()  # the run's collaborators (the guard is passed made)
        self.open_bench, self.reduce_trace = seams.open_bench, seams.reduce_trace
        self.source_readings, self.point_bound_s = seams.source_readings, seams.point_bound_s
        self.make_watchdog = seams.watchdog
        # a readings seam that takes ``between`` lets the reduction overlap the watch's replies
        self.readings_take_between = ("between" in
                                      inspect.signature(seams.source_readings).parameters)
        self.guard, self.policy, self.traffic_log = guard, policy, traffic_log
        self.scale = float(getattr(bench, "settle_scale", 1.0))
        self.sleep, self.clock = seams.sleep, seams.clock  # simulated by `labrun check`
        self.instruments: Any = None
        self.applied: dict[tuple[str, str], Any] = {}
        self.emitting = False
        self.guardian: Any = None  # labrun/guardian.py: told before the first switch-on
        self.osa_settings = plan.osa_settings(bench)  # the run's OSA settings (osa_auto)
        self.rbw_nm: float | None = None
        self.trace_meta: dict[str, Any] = {}  # the configured OSA settings of the output trace
        self.input_meta: dict[str, Any] = {}  # the same for the input trace (switch path 2)
        self.trace_x: Any = None
        self.orders = plan.orders
        self.use_amplifier = plan.amplifier
        # the input-tap power meter, read once per point (its reading stored with the point)
        self.read_tap = bool(getattr(plan, "tap_power", True)) and "power_meter" in \
            bench.instruments
        self.tap: dict[str, float] | None = None  # the last reading (``tap_reading``)
        # the roles a point's settings go to: the tap meter's wavelength only when it is read
        self.setting_roles = set(bench.instruments) - (set() if self.read_tap else
                                                       {"power_meter"})
        self.input_every = plan.osa.input_every if plan.capture_input else 0
        self.stops = StopWatch(plan.stop_conditions)
        # The plan's settle time of each group of settings: the longest of the axes driving it.
        self.settle = group_settles(plan.settle_s)
        # Fixed for the run: the bench's source roles (read on every emission check).
        self.source_roles = [r for r in SOURCE_ROLES if r in bench.instruments]
        self.show_progress = progress
        self.last_beat = 0.0
        self.identities: dict[str, str] | None = None
        self.lit = False  # the run has switched the sources on at least once
        self.current_key: str | None = None  # the point being measured, for fault events
        self.faults = 0
        # No light without progress (labrun/faults.py): when a fault darkened the bench, the
        # watchdog of the current attempt, and what every point's settling may take.
        self.dark_since: float | None = None
        self.may_emit = True  # something may have been switched on since the last go_dark
        self.committed = 0  # points this process stored
        self.early: list[tuple[str, str, dict[str, Any]]] = []  # events before the run row
        self.darkened: str | None = None  # why a database fault darkened the bench meanwhile
        self.watchdog: PointWatchdog | None = None
        self.announce_opening = True  # the first open starts what waits for it (preload)
        self.profile_settle_s = sum(op.settle_s for spec in bench.instruments.values()
                                    for op in spec.profile.operations.values())

    # ---- faults ------------------------------------------------------------------------------
    def record_fault(self, exc: BaseException, *, attempt: int, level: str,
                     command: str | None = None, role: str | None = None) -> None:
        """One ``fault`` event in the store: what failed, where, on which attempt."""
        self.faults += 1
        role = role or getattr(exc, "role", None)
        data: dict[str, Any] = {"attempt": attempt, "type": type(exc).__name__, "level": level}
        message = str(exc) if isinstance(exc, InstrumentError) else f"{type(exc).__name__}: {exc}"
        if role and not message.startswith(role):
            message = f"{role}: {message}"
        if command is not None:
            data["command"] = command[:200]
            message += f" ({command[:80]!r}, attempt {attempt})"
        if level == "reconnect":
            message = f"reconnect failed: {message}"
        self.event("fault", message, role=role,
                             point_key=self.current_key, data=data)

    def event(self, kind: str, message: str, **fields: Any) -> None:
        """An event of this run; kept until the run row exists (``attach``) when opening the
        bench comes first (its identities go into the transaction that creates the run)."""
        if self.run_id is None:
            self.early.append((kind, message, fields))
        else:
            self.store.add_event(self.run_id, kind, message, **fields)

    @property
    def row_id(self) -> int:
        """The run's id: its row exists before the first point (``attach``)."""
        if self.run_id is None:
            raise RuntimeError("the run row does not exist yet")
        return self.run_id

    def attach(self, run_id: int) -> int:
        """The run row now exists: write the events kept meanwhile; the run id."""
        self.run_id = run_id
        while self.early:
            kind, message, fields = self.early.pop(0)
            self.store.add_event(run_id, kind, message, **fields)
        return run_id

    def command_fault(self, session: Any, text: str, exc: BaseException, attempt: int) -> None:
        """Session hook: a failed exchange (the session reconnects and retries it itself)."""
        self.record_fault(exc, attempt=attempt, level="command", command=text,
                          role=getattr(session, "role", None))

    # ---- connections -------------------------------------------------------------------------
    def open(self) -> dict[str, str]:
        """Open every bench instrument; the identities as strings (each read until two replies
        agree, so a garbled reply is neither recorded nor mistaken for another instrument)."""
        if self.announce_opening:  # scipy, the store: loaded while the instruments answer
            self.announce_opening = False
            preload("labrun.reduce")
            bench_opening()
        instruments = self.open_bench(self.bench, traffic_log=self.traffic_log,
                                 on_fault=self.command_fault)
        self.guard.set_instruments(instruments)
        try:
            ids = {role: str(idn) for role, idn in instruments.confirmed_identities().items()}
        except BaseException:
            with contextlib.suppress(Exception):
                instruments.close()
            raise
        self.instruments = instruments
        if self.identities is not None and ids != self.identities:
            changed = ", ".join(r for r in sorted(set(ids) | set(self.identities))
                                if ids.get(r) != self.identities.get(r))
            raise RunAborted(f"instrument identity changed on reconnect ({changed})")
        self.identities = ids
        return ids

    def open_retrying(self) -> dict[str, str]:
        """Open the bench, retrying per the policy (a fault while connecting is an event too)."""
        attempt = 0
        while True:
            attempt += 1
            try:
                return self.open()
            except InstrumentError as exc:
                if not getattr(exc, "fault_reported", False):
                    self.record_fault(exc, attempt=attempt, level="open")
                if attempt >= self.policy.attempts:
                    raise RunAborted(f"cannot open the bench: {exc} (after {attempt} attempts)"
                                     ) from exc
                self.event("retry", f"opening the bench, attempt "
                                     f"{attempt + 1}", data={"attempt": attempt + 1})
                self.wait_until(self.clock() + self.policy.delay_s(attempt) * self.scale)

    def close(self) -> None:
        """Close the connections (after the safe-off)."""
        if self.instruments is not None:
            with contextlib.suppress(Exception):
                self.instruments.close()

    def reconnect(self) -> None:
        """Drop and reopen every connection; forget what was applied (the fault may have reset)."""
        self.close()
        self.instruments = None
        self.applied.clear()
        self.trace_x = None
        self.emitting = False
        self.open()

    def role(self, name: str) -> Any:
        """The adapter of one role."""
        return self.instruments[name]

    # ---- settings ----------------------------------------------------------------------------
    def settings_for(self, setpoint: dict[str, Any]) -> list[Setting]:
        """Instrument settings of a point (``labrun.setpoints``, the mapping the plan-time check
        reads too), each with the plan's settle time for its axes."""
        from labrun import safety

        got = safety.instrument_settings({**setpoint, "amplifier": self.use_amplifier},
                                         self.bench)
        values = {**setpoint, **asdict(got)}  # what safety worked out wins over the setpoint
        return [Setting(t.role, t.method, t.value, self.settle[t.group])
                for t in targets(values, self.setting_roles)]

    def write(self, settings: Sequence[Setting]) -> Pending:
        """Check every setting that changed (ranges, caps: nothing is sent if one fails), then
        write them all, every instrument at once; the deadline of the one settle wait.

        Without a settle time to wait, the read-backs travel with the writes (confirmed).
        """
        from labrun.instruments.batch import write_all

        self.check_progress()
        todo = [s for s in settings if self.applied.get((s.role, s.method)) != s.value]
        planned: list[Any] = []
        settles: list[float] = []
        for s in todo:
            ops = self.role(s.role).planned(s.method, s.value)
            planned += ops
            settles.append(setting_s([p.op.settle_s for p in ops], s.settle_s))
        wait = wait_s(settles, self.scale)
        for s in todo:
            # Unknown until confirmed: a failed setting must not look like a change made
            # behind labrun's back to the emission watch (check_power).
            self.applied.pop((s.role, s.method), None)
        write_all(planned, read_back=wait <= 0)
        return Pending(todo, planned, wait, self.clock() + wait, confirmed=wait <= 0)

    def confirm(self, pending: Pending) -> None:
        """Read back and verify every setting written (all instruments at once), then mark them
        applied."""
        from labrun.instruments.batch import read_back_all

        if not pending.confirmed:
            read_back_all(pending.planned)
        for s in pending.settings:
            self.applied[(s.role, s.method)] = s.value

    def apply(self, settings: Sequence[Setting]) -> None:
        """Set, wait once, read back: write every setting that changed, wait for the longest
        settle time of what moved (settles overlap, as on a real bench), verify them all."""
        pending = self.write(settings)
        self.wait_until(pending.deadline)
        self.confirm(pending)

    def wait_until(self, deadline: float) -> None:
        """Sleep until ``deadline``, watching emission and beating the heartbeat meanwhile."""
        while True:
            left = deadline - self.clock()
            if left <= 0:
                return
            self.sleep(min(left, 0.25))
            if self.emitting and deadline - self.clock() > 0:
                self.check_emission()
            self.beat()

    def beat(self, force: bool = False) -> None:
        """Heartbeat in the store, at most once a second."""
        now = self.clock()
        if (force or now - self.last_beat >= 1.0) and self.run_id is not None:
            self.store.heartbeat(self.run_id)
            self.last_beat = now

    # ---- emission ----------------------------------------------------------------------------
    def sources(self) -> list[str]:
        """Source roles on this bench."""
        return self.source_roles

    def check_emission(self, between: Callable[[], None] | None = None) -> None:
        """The emission watch (labrun/emission.py): abort on a source in an unexpected state,
        an open interlock, or a power changed behind labrun's back. ``between`` runs while the
        sources answer (the trace's reduction, after a sweep)."""
        emission.check_emission(self, between)

    def check_power(self, role: str, adapter: Any, power: float) -> None:
        """A source's power against its cap and the value set (labrun/emission.py)."""
        emission.check_power(self, role, adapter, power)

    def expected_on(self, role: str) -> bool:
        """Whether a source should emit now (an amplifier the plan does not use stays off)."""
        return self.emitting and (role != "amplifier" or self.use_amplifier)

    def prepare(self, first: Sequence[Setting]) -> None:
        """Apply the first point with outputs off, then switch on: shutters, lasers, amplifier.

        The amplifier is switched on only for plans that use it (``plan.amplifier``): the worst
        case and the settings of other plans assume no gain after the combiner.
        """
        self.guard.check()  # the acknowledgement holds only while nobody asked the run to stop
        self.may_emit = True
        if self.dark_since is not None:
            self.event("relight", "switching on again after a fault "
                       "(power set and read back, caps and interlock checked)",
                       point_key=self.current_key)
        for role in self.sources():
            if self.role(role).output_state():
                if not self.lit:  # after a reconnect it is on because the run switched it on
                    self.event("found_on", f"{role} output was on before the run switched "
                               "anything on; switching it off", role=role)
                self.role(role).output_off()
        pending = self.write(first)
        if not pending.confirmed:  # a source goes on only once its power is set and confirmed
            from labrun.instruments.batch import read_back_all

            read_back_all([p for p in pending.planned if p.op.name == "set_power_dbm"])
        deadline = pending.deadline
        if self.guardian is not None:  # armed before any output goes on
            self.guardian.lit(self.run_id)
        on = [*ATTENUATOR_ROLES, *LASER_ROLES]
        for role in on + (["amplifier"] if self.use_amplifier else []):
            adapter = self.role(role)
            adapter.output_on(settle=False)  # its settle time overlaps the settings' wait
            op_s = adapter.profile.op("output_on").settle_s
            deadline = max(deadline, self.clock() + wait_s([op_s], self.scale))
        self.emitting = self.lit = True
        self.wait_until(deadline)
        self.confirm(pending)
        self.check_emission()

    def configure_osa(self, setpoint: dict[str, Any]) -> None:
        """Apply the plan's OSA settings for this point (re-centred if the pump moves): set,
        wait once and read back like every other setting, only what changed."""
        s = self.osa_settings.for_point(setpoint)
        wanted = (s.center_nm, s.span_nm, s.rbw_nm, int(s.points))
        if self.applied.get(("osa", "configure")) != wanted:
            self.trace_x = None
            self.applied.pop(("osa", "configure"), None)
            self.apply([Setting("osa", name, value) for name, value in zip(OSA_SETTINGS, wanted,
                                                                           strict=True)])
            self.applied[("osa", "configure")] = wanted
            # Stored with each trace; built once per OSA configuration, not per point.
            self.trace_meta = {"center_nm": s.center_nm, "span_nm": s.span_nm,
                               "rbw_nm": s.rbw_nm, "points": s.points}
            self.input_meta = {**self.trace_meta, "switch_path": 2}
        self.rbw_nm = float(s.rbw_nm)

    def sweep_and_read(self, osa: Any) -> tuple[Any, Any]:
        """Sweep and read (x, y); x is read once per OSA configuration (it is fixed by centre,
        span and points), then only y travels, halving the transfer per point."""
        x, y = osa.sweep_and_read(with_x=self.trace_x is None)
        if x is None:
            x = self.trace_x
        self.check_trace(x, y)
        self.trace_x = x
        return x, y

    def check_trace(self, x: Any, y: Any) -> None:
        """Refuse (InstrumentError, retried) a trace that is short, ragged or corrupted
        (labrun/capture.py), against the configured number of samples."""
        check_trace(x, y, int(self.applied[("osa", "configure")][3]))

    # ---- one point ---------------------------------------------------------------------------
    def wants_input(self, spec: PointSpec) -> bool:
        """True when this point also captures the spool input (every ``osa.input_every``-th
        point of the plan, by plan index, so a resumed run captures the same points)."""
        return bool(self.input_every) and spec.index % self.input_every == 0

    def path_settings(self, kind: str) -> list[Setting]:
        """The switch setting that routes the OSA to ``kind``'s trace (path 1 spool output, 2
        input tap); none without a switch."""
        if "switch" not in self.bench.instruments:
            return []
        return [Setting("switch", "set_path", 2 if kind == "input" else 1)]

    def capture(self, kind: str) -> Captured:
        """Sweep and read one trace through the switch path of ``kind`` ("output" or "input");
        the switch is set (and waited for) only when it is not there yet."""
        self.apply(self.path_settings(kind))
        x, y = self.sweep_and_read(self.role("osa"))
        return Captured(kind, x, y)

    def measure(self, spec: PointSpec) -> tuple[list[Captured], Reduction, int]:
        """Set, settle, sweep, read, check and reduce one point, retrying faults per the policy.

        Returns the traces (output first; then the spool input when this point captures it,
        through switch path 2), the output trace's reduction, and the attempts it took.
        Safety conditions (RunAborted, SafetyError) are never retried.
        """
        kinds = ("input", "output") if self.wants_input(spec) else ("output",)
        # The first trace's switch path moves with the other settings (one wait for all).
        settings = self.settings_for(spec.setpoint) + self.path_settings(kinds[0])
        self.current_key = spec.key
        settle = max([s.settle_s for s in settings] + [0.0]) + self.profile_settle_s
        bound = self.point_bound_s(settle * self.scale, len(kinds), self.bench)
        attempt = 0
        while True:
            attempt += 1
            if self.darkened is not None:  # a database fault darkened the bench meanwhile
                self.go_dark(self.darkened, done=True)
            try:
                with self.make_watchdog(bound, self.overrun) as self.watchdog:
                    traces = self.attempt_point(spec, settings, kinds)
                self.overran_after_last_check()
                self.dark_since = None
                return traces, traces[0].reduction, attempt
            except InstrumentError as exc:
                self.fault(spec, attempt, exc)
            finally:
                self.watchdog = None

    # ---- no light without progress (policy: labrun/faults.py) -------------------------------
    def overrun(self) -> None:
        """Watchdog thread: the attempt outlived its bound; darken now, over fresh connections
        where the run loop holds a session (it is told by ``check_progress``)."""
        self.darken_bench()

    def store_dark(self, exc: BaseException) -> None:
        """RunStore hook (maybe from its slow-write timer), at a database fault: darken before
        the brief retries; the run loop does the bookkeeping (``darkened``, ``check_progress``)
        and writes the ``dark`` event once the database takes it."""
        self.darkened = f"sources switched off after a {describe(exc)}"  # before: the loop
        problems = self.darken_bench()  # may see the outputs go off (the writer is a thread)
        if problems:
            self.darkened += "; NOT CONFIRMED OFF: " + "; ".join(problems)

    def darken_bench(self) -> list[str]:
        """Every source off at once (labrun/safe_off.py); the problems left."""
        return darken(self.bench, self.instruments)

    def overran_after_last_check(self) -> None:
        """PointOverrun when the (now disarmed) watchdog fired after the attempt's last
        ``check_progress``: its thread darkened the bench all the same, so the point is not
        done and the loop must know the light is off (a ``dark`` event, then ``prepare``)."""
        dog = self.watchdog
        if dog is not None and dog.fired.is_set():
            raise dog.overrun()

    def check_progress(self) -> None:
        """In the run loop: PointOverrun once the current attempt's watchdog fired, or once a
        database fault darkened the bench (the attempt is not finished in the dark)."""
        dog = self.watchdog
        if dog is not None and dog.overdue():
            raise dog.overrun()
        if self.darkened is not None:
            raise PointOverrun(self.darkened)

    def go_dark(self, reason: str, *, done: bool = False) -> None:
        """Every source off at once (attenuators to maximum), recorded as a ``dark`` event;
        everything is set again, and emission comes back only through ``prepare``.
        ``done``: the watchdog already darkened the bench."""
        if not self.may_emit and not done:
            return  # still dark from the last fault: nothing was switched on since
        problems = [] if done else self.darken_bench()
        self.darkened = None
        self.may_emit = False
        self.emitting = False
        self.applied.clear()
        self.trace_x = None
        if self.dark_since is None:
            self.dark_since = self.clock()
        note = "" if not problems else "; NOT CONFIRMED OFF: " + "; ".join(problems)
        self.event("dark", f"sources off after a fault: {reason}{note}",
                   point_key=self.current_key,
                   data={"problems": problems, "reason": reason[:200],
                         "limit_s": self.policy.dark_limit_s})

    def attempt_point(self, spec: PointSpec, settings: Sequence[Setting],
                      kinds: Sequence[str]) -> list[Captured]:
        """One try at a point: its traces, checked and reduced (InstrumentError on any fault)."""
        if self.instruments is None:  # a reconnect after a fault failed: try again
            self.open()
        self.configure_osa(spec.setpoint)
        if not self.emitting:
            self.prepare(settings)
        self.apply(settings)
        self.tap = None
        tap = self.send_tap_query()  # answered while the OSA sweeps
        try:
            traces = [self.capture(kind) for kind in kinds]
        except BaseException:
            if tap is not None:
                tap[1].abandon()
            raise
        if tap is not None:
            self.tap = self.tap_reading(*tap)
        traces.sort(key=lambda t: t.kind != "output")
        unreduced: list[InstrumentError] = []

        def reduce_meanwhile() -> None:
            """Reduce while the sources answer the watch; a trace fault waits for its verdict
            (an unexpected emission state outranks it, as when the watch came first)."""
            try:
                self.reduce(spec, traces)
            except InstrumentError as exc:
                unreduced.append(exc)

        self.check_emission(between=reduce_meanwhile)
        if unreduced:
            raise unreduced[0]
        return traces

    def send_tap_query(self) -> tuple[Any, Any] | None:
        """Ask the input-tap power meter for its reading, the reply left unread (the point's
        settings are confirmed and settled; the meter answers while the OSA sweeps); None
        when this run reads no tap. Not a safety interlock: nothing checks it against a cap."""
        if not self.read_tap:
            return None
        from labrun.scpi import send_each

        meter = self.role("power_meter")
        op, text = meter.query_text("read_power_dbm")
        return op, send_each([(meter.session, text)])

    def tap_reading(self, op: Any, pending: Any) -> dict[str, float]:
        """The power meter's reply (dBm) and the total launched power at the spool input it
        gives (reading + the bench's ``input_tap_db``); InstrumentError (retried) on a reply
        that is not a finite power."""
        meter = self.role("power_meter")
        reading = float(meter.parse(op, pending.read()[0]))
        if not math.isfinite(reading):
            raise meter.instrument_error(f"power reading {reading!r} is not a finite power")
        tap_db = float(self.bench.calibration.input_tap_db)
        return {"power_meter_dbm": reading, "input_tap_db": tap_db,
                "launched_total_dbm": reading + tap_db}

    def reduce(self, spec: PointSpec, traces: Sequence[Captured]) -> None:
        """Reduce each trace and check both tones were found (InstrumentError: retried)."""
        tones = expected_thz(spec.setpoint)
        for tr in traces:
            try:
                # rbw_nm is set when the OSA is configured, before any capture
                tr.reduction = self.reduce_trace(tr.x, tr.y, cast(float, self.rbw_nm), x_unit="nm",
                                            orders=self.orders, expected_thz=tones)
            except ValueError as exc:  # an unusable trace (NaN, 1e5 dBm samples): retried
                raise InstrumentError(f"{tr.kind} trace cannot be reduced: {exc}",
                                      role="osa") from None
            check_tones(tr)

    def fault(self, spec: PointSpec, attempt: int, exc: InstrumentError) -> None:
        """Darken first when the policy says so (``faults.darkens``: no answer, an overrun, or
        a second failure in a row), record the fault (unless its session already did), then
        prepare the retry: wait the backoff, and reconnect when an instrument stopped answering;
        abort beyond the policy (attempts, or ``dark_limit_s`` spent dark).

        A reconnect that fails is a fault too; the next attempt then opens the bench again.
        Other faults (an error-queue entry, a garbled or short reply, a failed read-back) keep
        the connections: what failed was never marked applied, so it is set again, and the
        sweep is taken again.
        """
        overran = isinstance(exc, PointOverrun)
        if darkens(exc, attempt, overran):
            self.go_dark(str(exc), done=overran)
        if not getattr(exc, "fault_reported", False):
            self.record_fault(exc, attempt=attempt, level="point")
        if attempt >= self.policy.attempts:
            raise RunAborted(f"point {spec.key}: {exc} (after {attempt} attempts)") from exc
        dark_s = 0.0 if self.dark_since is None else self.clock() - self.dark_since
        if dark_s >= self.policy.dark_limit_s:
            raise RunAborted(f"point {spec.key}: {exc} (dark for {dark_s:.0f} s after "
                             f"{attempt} attempts, limit {self.policy.dark_limit_s:g} s)"
                             ) from exc
        self.wait_until(self.clock() + self.policy.delay_s(attempt) * self.scale)
        self.trace_x = None  # read x again with the next sweep
        if self.policy.reconnect and (isinstance(exc, NoAnswerError) or self.instruments is None):
            try:
                self.reconnect()
            except InstrumentError as again:
                if not getattr(again, "fault_reported", False):
                    self.record_fault(again, attempt=attempt, level="reconnect")
        self.event("retry", f"attempt {attempt + 1}", point_key=spec.key,
                   data={"attempt": attempt + 1, "after": type(exc).__name__})

    def commit(self, spec: PointSpec, traces: Sequence[Captured], red: Reduction, attempts: int,
               started: Any) -> None:
        """Point, traces and lines in one transaction (input-trace lines link to that trace)."""
        self.store_point(self.point_row(spec, traces, red, attempts, started))

    def point_row(self, spec: PointSpec, traces: Sequence[Captured], red: Reduction,
                  attempts: int, started: Any) -> dict[str, Any]:
        """Everything the store keeps of a point, taken now (labrun/commit.py)."""
        return point_row(spec, traces, red, attempts, started, applied=self.applied,
                         rbw_nm=self.rbw_nm, trace_meta=self.trace_meta,
                         input_meta=self.input_meta, tap=self.tap)

    def store_point(self, row: dict[str, Any]) -> None:
        """One transaction for a point row (on the writer thread during a run)."""
        from sqlalchemy.exc import IntegrityError

        try:
            self.store.add_point(self.row_id, **row)
        except IntegrityError:
            # a retry after a connection lost just after the commit: stored once, keep going
            if row["key"] not in self.store.completed_keys(self.row_id):
                raise
        self.committed += 1
        self.last_beat = self.clock()

    def flush_traffic_log(self) -> None:
        """Flush a streamed traffic log once per point, before its commit: a crash keeps every
        stored point's traffic on disk."""
        flush = getattr(self.traffic_log, "flush", None)
        if flush is not None:
            flush()

    def run_points(self, specs: Sequence[PointSpec], *, done: int, total: int) -> int:
        """Measure and store every spec in order; returns the number of points stored in all.

        Point N is committed on a writer thread (``labrun.writer``) while point N+1 is measured;
        every way out of the loop first lets the point in flight finish storing.
        """
        from labrun.store.kinds import utcnow
        from labrun.writer import PointWriter

        bar = progress_bar(total, done, self.show_progress)
        writer = PointWriter()
        try:
            for spec in specs:
                self.guard.check()
                started = utcnow()
                traces, red, attempts = self.measure(spec)
                self.flush_traffic_log()  # before the commit: a stored point's traffic is on disk
                row = self.point_row(spec, traces, red, attempts, started)
                writer.submit(functools.partial(self.store_point, row))
                done += 1
                if bar is not None:
                    bar.set_postfix_str(postfix(red), refresh=False)
                    bar.update(1)
                reason = self.stops.update(red.lines)
                if reason:
                    raise StopRequested(reason)
        except BaseException:
            writer.close(raise_errors=False)  # the point in flight is stored all the same
            raise
        else:
            writer.close()
        finally:
            if bar is not None:
                bar.close()
        return done


# ------------------------------------------------------------------------------------------------
# helpers
# ------------------------------------------------------------------------------------------------
# ------------------------------------------------------------------------------------------------
# entry points
# ------------------------------------------------------------------------------------------------
def _abspath(path: Any) -> str | None:
    """Absolute path text of a file (None for '<plan>'-style names or None)."""
    if not path or str(path).startswith("<"):
        return None
    return str(Path(path).resolve())


def _run_fields(plan: Plan, bench: Bench, *, operator: str | None, unattended: bool,
                total: int) -> dict[str, Any]:
    """Columns of a new Run row."""
    return dict(
        status=RunStatus.CREATED, plan_name=plan.name,
        plan_path=_abspath(plan.file), plan_text=plan.text,
        plan_sha256=plan.sha256, bench_name=bench.name,
        bench_path=_abspath(bench.path), bench_text=bench.text, operator=operator,
        unattended=unattended,
        software_version=__version__, points_total=total, host=socket.gethostname(),
        pid=os.getpid(),
    )


def run_plan(plan: Plan, bench: Bench, store: AnyStore, *, operator: str | None = None,
             unattended: bool = False, ack_safety: bool = False,
             confirm: Callable[[str], bool] | None = None, policy: RetryPolicy | None = None,
             progress: bool = True, traffic_log: Any = None,
             echo: TextIO | None = None,
             estimate_s_per_point: float | None = None,
             seams: Seams | None = None, guardian: bool = False) -> RunOutcome:
    """Run a plan on a bench into the store; returns how it ended (never leaves a source on).

    Raises InputError/SafetyError before touching anything when the run may not start.
    ``seams``: what the run calls outside the engine (default: the real instruments and
    reduction, the monotonic clock and time.sleep). ``guardian``: a watcher process darkens
    the bench should this process die lit (SIGKILL; labrun/guardian.py), as ``labrun run`` does.
    """
    text = preflight(plan, bench, operator=operator, unattended=unattended,
                     ack_safety=ack_safety, confirm=confirm)
    if echo is not None and unattended:
        print(text, file=echo)
    store = as_run_store(store)  # a database fault from here on is one line, not a traceback
    specs = list(plan.points())
    fields = _run_fields(plan, bench, operator=operator, unattended=unattended,
                         total=len(specs))
    made: list[int] = []

    def create(identities: dict[str, str] | None) -> int:
        """The run row with the identities just read (None: the bench never opened), in one
        transaction: a run killed right after it can be resumed without --force. Once. The
        store's first use: ``labrun run`` opens it meanwhile (labrun/store/deferred.py)."""
        if made:
            return made[0]
        spool_id = store.spool_id(plan.spool, **plan.spool_info)
        made.append(store.create_run(**fields, spool_id=spool_id, identities=identities))
        record_ack(store, made[0], plan, bench, operator=operator, unattended=unattended,
                   text=text)
        record_traffic_log(store, made[0], traffic_log)
        return made[0]

    return _execute(plan, bench, store, None, specs, done=0, policy=policy,
                    progress=progress, traffic_log=traffic_log, first=True, create=create,
                    estimate=estimate_s_per_point, seams=seams, guardian=guardian)


def run_virtual(plan: Plan, bench: Bench, store: AnyStore, *, replay_of: int, mode: str,
                policy: RetryPolicy | None = None, progress: bool = False,
                traffic_log: Any = None,
                created: Callable[[int], None] | None = None) -> RunOutcome:
    """Run a plan on instruments that emit no light (a replay, labrun.replay): the caps are
    checked as for any run, no acknowledgement is asked; a ``replay`` event links the new run
    to run ``replay_of``. ``created(run_id)`` is called once the run row exists."""
    from labrun import safety

    require_roles(plan, bench)
    violations = list(safety.check_caps(plan, bench))
    if violations:
        raise SafetyError("refused, the plan exceeds a power cap: "
                          + "; ".join(str(v) for v in violations))
    specs = list(plan.points())
    run_id = store.create_run(**_run_fields(plan, bench, operator=None, unattended=True,
                                            total=len(specs)), replay_of=replay_of)
    store.add_event(run_id, "replay", f"replay of run {replay_of} ({mode}): virtual, no light "
                    "emitted", data={"replay_of": replay_of, "mode": mode})
    if created is not None:
        created(run_id)
    record_traffic_log(store, run_id, traffic_log)
    return _execute(plan, bench, store, run_id, specs, done=0, policy=policy,
                    progress=progress, traffic_log=traffic_log, first=True)


def record_ack(store: AnyStore, run_id: int, plan: Plan, bench: Bench, *, operator: str | None,
               unattended: bool, text: str, resumed: bool = False) -> None:
    """The ``safety_ack`` event: who acknowledged emission, how, and the worst case shown (the
    event's own time is when). A resume records its own: it emits again, maybe hours later."""
    from labrun import safety

    wc = safety.worst_case(plan, bench)
    ack = "acknowledged unattended (--ack-safety)" if unattended else "confirmed interactively"
    what = "resumed emission" if resumed else "emission"
    store.add_event(run_id, "safety_ack", f"{what} {ack} by {operator or 'operator'} "
                    f"(advisory hazard class {wc.hazard_class})",
                    data={"operator": operator, "unattended": unattended, "text": text,
                          "hazard_class": wc.hazard_class, "resume": resumed,
                          "max_launched_dbm": wc.max_launched_dbm})


def record_traffic_log(store: AnyStore, run_id: int, traffic_log: Any) -> None:
    """A ``traffic_log`` event naming the file the instrument traffic streams to (if any)."""
    path = getattr(traffic_log, "path", None)
    if path is not None:
        store.add_event(run_id, EVENT_KIND, f"instrument traffic streamed to {path}",
                        data={"path": str(path)})


def _execute(plan: Plan, bench: Bench, store: AnyStore, run_id: int | None,
             specs: Sequence[PointSpec], *, done: int, policy: RetryPolicy | None,
             progress: bool, traffic_log: Any, first: bool,
             expect_identities: dict[str, str] | None = None, force: bool = False,
             create: Callable[[dict[str, str] | None], int] | None = None,
             estimate: float | None = None, seams: Seams | None = None,
             guardian: bool = False) -> RunOutcome:
    """Open, run ``specs``, and close run ``run_id`` under the safe-off guard. Without a
    ``run_id``, ``create(identities)`` makes the run row once the bench is open. ``guardian``:
    a watcher process darkens the bench if this process dies lit (labrun/guardian.py)."""
    from labrun.store.kinds import utcnow

    total = len(specs) + done if run_id is None else _points_total(store, run_id)
    seams = seams or Seams()
    guard = seams.guard(bench)
    store = as_run_store(store)  # a database fault: darken, retry briefly, then StoreFault
    runner = Runner(plan, bench, store, run_id, guard, policy=policy or RetryPolicy(),
                    progress=progress, traffic_log=traffic_log, seams=seams)
    store.on_fault = runner.store_dark
    if guardian:  # started now, so it is ready (imports, bench) before the first switch-on
        from labrun import guardian as watcher

        runner.guardian = watcher.start(bench, store.url)
    start_done = done
    guard.install()
    caught: BaseException | None = None
    finished = False
    try:
        try:
            identities = runner.open_retrying()
            if run_id is None and create is not None:
                run_id = runner.attach(create(identities))
            if expect_identities is not None:
                check_identities(expect_identities, identities, force=force,
                                 run_id=runner.row_id, store=store)
            fields: dict[str, Any] = {"status": RunStatus.RUNNING, "heartbeat_at": utcnow(),
                                      "pid": os.getpid(), "host": socket.gethostname()}
            if first:
                fields.update(identities=identities, started_at=utcnow(),
                              settings={"osa": _jsonable(runner.osa_settings.to_dict()),
                                        "settle_scale": runner.scale,
                                        "retry": asdict(runner.policy),
                                        "estimate_s_per_point": estimate})
            store.update_run(runner.row_id, **fields)
            runner.run_points(specs, done=done, total=total)
            finished = True
        except BaseException as exc:  # noqa: BLE001 - classified below, re-raised if unexpected
            caught = exc
        finally:
            guard.defer()  # from here on a signal is only recorded: nothing may cut the way out
    except RunInterrupted as late:  # the one signal, between the run's end and defer()
        if caught is None and not finished:  # it cut short the line above: keep what ended it
            caught = late.__context__ or late
    try:
        status, reason, error, signum = _classify(caught)
        problems = guard.shutdown()
        if runner.guardian is not None:  # our own safe-off is over: the watcher leaves
            runner.guardian.done()
        runner.close()
        runner.flush_traffic_log()
        done = start_done + runner.committed
        events = [("safe_off", "all sources off, attenuators at maximum"
                                       if not problems else
                                       "NOT CONFIRMED OFF: " + "; ".join(problems))]
        if status == RunStatus.COMPLETED and done < total:
            status, reason = RunStatus.FAILED, f"only {done} of {total} points stored"

        def late_signal() -> list[tuple[str, str]]:
            """A signal that came while the run was finishing (also while writing its end)."""
            if signum is not None or guard.signum is None:
                return []
            return [("signal", f"{_signal.Signals(guard.signum).name} received while the run "
                               f"was finishing ({status}); recorded, not acted on")]

        if runner.run_id is None and create is not None:  # the bench never opened
            runner.attach(create(None))
        run_id = cast(int, runner.run_id)  # given, or created just above
        reason = _record_end(store, run_id, status, reason, events, problems, late_signal)
    finally:
        guard.uninstall()
    if error is not None and not isinstance(error, InstrumentError | SafetyError):
        raise error
    return RunOutcome(run_id=run_id, status=status, points_done=done, points_total=total,
                      reason=reason, db=store.url, safe_off_problems=problems, signal=signum)


def _points_total(store: AnyStore, run_id: int) -> int:
    """How many points run ``run_id`` has in all (stored with it)."""
    run = store.get_run(run_id)
    if run is None:
        raise InputError(f"no run {run_id} in this database", field="RUN_ID")
    return int(run.points_total)


def _record_end(store: RunStore, run_id: int, status: RunStatus, reason: str | None,
                events: list[tuple[str, str]], problems: list[str],
                late: Callable[[], list[tuple[str, str]]]) -> str | None:
    """The run's last events (``late()`` is asked once the others are written), its final
    status event and status; what the database refuses goes to a fallback record beside it
    (labrun/runstore.py) and the reason says where. The reason kept."""
    todo = list(events)
    try:
        while todo:
            kind, message = todo[0]
            store.add_event(run_id, kind, message,
                            data={"problems": problems} if kind == "safe_off" else None)
            todo.pop(0)
            if not todo and kind != status:  # the others are in: a late signal, then the end
                todo = [*late(), (status, reason or status)]
        store.set_status(run_id, status, reason, finished=True)
        return reason
    except StoreFault as exc:
        if not todo or todo[-1] != (status, reason or status):
            todo += [*late(), (status, reason or status)]
        path = write_fallback(store.url, {"run_id": run_id, "status": status, "reason": reason,
                                          "events": todo, "store_faults": store.faults})
        where = f"kept in {path}" if path else "NOT KEPT anywhere (see the log)"
        return f"{reason or status}; the database refused the final status ({exc}), {where}"


def _classify(exc: BaseException | None) -> tuple[RunStatus, str | None, BaseException | None,
                                                  int | None]:
    """How a run ended, from what left its loop: (status, reason, error to re-raise or report,
    signal number). None: every point was measured."""
    if exc is None:
        return RunStatus.COMPLETED, None, None, None
    if isinstance(exc, StopRequested):
        return RunStatus.STOPPED, str(exc), None, None
    if isinstance(exc, RunInterrupted):
        return RunStatus.INTERRUPTED, str(exc), None, exc.signum
    if isinstance(exc, KeyboardInterrupt):
        return RunStatus.INTERRUPTED, "interrupted (KeyboardInterrupt)", None, SIGINT
    if isinstance(exc, RunAborted | StoreFault):
        return RunStatus.ABORTED, str(exc), None, None
    if isinstance(exc, InstrumentError | SafetyError):
        return RunStatus.ABORTED, str(exc), exc, None
    return RunStatus.FAILED, f"{type(exc).__name__}: {exc}", exc, None


def check_identities(expected: dict[str, str], found: dict[str, str], *, force: bool,
                     run_id: int, store: AnyStore) -> None:
    """Refuse to resume on different instruments (unless forced, then record it)."""
    diffs = [f"{role}: was {expected.get(role)!r}, now {found.get(role)!r}"
             for role in sorted(set(expected) | set(found))
             if expected.get(role) != found.get(role)]
    if not diffs:
        return
    if not force:
        raise SafetyError("instruments differ from the run's (use --force to resume anyway): "
                          + "; ".join(diffs))
    store.add_event(run_id, "forced", "resumed on different instruments: " + "; ".join(diffs))


def plan_from_run(run: Any, *, force: bool) -> Plan:
    """The plan of a stored run, rebuilt from its stored text; checks hash and the file on disk."""
    import hashlib
    import tempfile

    from labrun.plan import load_plan

    if hashlib.sha256(run.plan_text.encode("utf-8")).hexdigest() != run.plan_sha256 \
            and not force:
        raise SafetyError(f"run {run.id}: stored plan text does not match its sha256")
    original = Path(run.plan_path) if run.plan_path else None
    if original is not None and original.is_file():
        current = load_plan(original)
        if current.sha256 == run.plan_sha256:
            return current
        if not force:
            raise SafetyError(f"run {run.id}: plan file {original} changed since the run started "
                              "(sha256 differs); use --force to resume with the stored plan")
    # The file is gone (or changed, forced): load the stored text from a file beside it.
    folder = original.parent if original is not None and original.parent.is_dir() else None
    with tempfile.NamedTemporaryFile("w", suffix=".toml", dir=folder, delete=False,
                                     encoding="utf-8") as fh:
        fh.write(run.plan_text)
    try:
        return load_plan(fh.name)
    finally:
        os.unlink(fh.name)


def resume_run(run_id: int, store: AnyStore, *, bench: Bench | None = None, force: bool = False,
               operator: str | None = None, unattended: bool = False, ack_safety: bool = False,
               confirm: Callable[[str], bool] | None = None, policy: RetryPolicy | None = None,
               progress: bool = True, traffic_log: Any = None,
               echo: TextIO | None = None, seams: Seams | None = None,
               guardian: bool = False) -> RunOutcome:
    """Continue a stored run: same plan (hash checked), same instruments, skip stored points.

    Resuming emits light again, perhaps hours later with people in the room, so it asks for the
    safety acknowledgement again (as ``run_plan``), before any instrument is opened.
    """
    from labrun.bench import load_bench

    store = as_run_store(store)
    apply_fallback(store)  # a final status the database refused last time goes in first
    run = store.get_run(run_id)
    if run is None:
        raise InputError(f"no run {run_id} in {store.url}", field="RUN_ID")
    if run.status in FINISHED_STATUSES:
        raise InputError(f"run {run_id} is already {run.status}", field="RUN_ID")
    # Never overridden, not even by --force (which only covers a changed plan or different
    # instruments): two processes must not drive the same lasers.
    if run.status == RunStatus.RUNNING and process_alive(run):
        raise SafetyError(f"run {run_id} is still running (pid {run.pid} on {run.host}); "
                          "--force does not override this")
    if run.pid and run.host == socket.gethostname():
        from labrun.guardian import wait_for_watchers_of

        left = wait_for_watchers_of(int(run.pid))  # a killed run's watcher may be darkening
        if left:
            raise SafetyError(f"the watcher of run {run_id}'s killed process (pid "
                              f"{', '.join(map(str, left))}) is still darkening the bench; "
                              "resume once it has finished")
    if bench is None:
        if not run.bench_path or not Path(run.bench_path).is_file():
            raise InputError(f"the run's bench file {run.bench_path} is gone; give --bench",
                             field="--bench")
        bench = load_bench(run.bench_path)
    plan = plan_from_run(run, force=force)
    text = preflight(plan, bench, operator=operator, unattended=unattended,
                     ack_safety=ack_safety, confirm=confirm)
    if echo is not None and unattended:
        print(text, file=echo)
    record_ack(store, run_id, plan, bench, operator=operator, unattended=unattended, text=text,
               resumed=True)
    record_traffic_log(store, run_id, traffic_log)
    done_keys = store.completed_keys(run_id)
    specs = [s for s in plan.points() if s.key not in done_keys]
    store.add_event(run_id, "resume", f"resuming: {len(done_keys)} points stored, "
                    f"{len(specs)} to go", data={"force": force, "bench": str(bench.path)})
    return _execute(plan, bench, store, run_id, specs, done=len(done_keys), policy=policy,
                    progress=progress, traffic_log=traffic_log, first=False,
                    expect_identities=dict(run.identities or {}), force=force, seams=seams,
                    guardian=guardian)


def process_alive(run: Any) -> bool:
    """True if the run's process still exists on this host (a fresh heartbeat elsewhere counts)."""
    from labrun.store.kinds import utcnow

    if run.host and run.host != socket.gethostname():
        beat = run.heartbeat_at
        return beat is not None and (utcnow() - beat).total_seconds() < STALE_HEARTBEAT_S
    if not run.pid or run.pid == os.getpid():
        return False
    try:
        os.kill(run.pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
