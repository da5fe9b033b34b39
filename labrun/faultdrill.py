"""Owns the fault drills: each fault of issue 13's table forced on the virtual lab in the middle
of a run, timed from the fault against the lab's own state.

``measure(row, folder)`` runs a plan on a fresh virtual lab, waits until a few points are stored,
forces the fault, and reports by when every reachable source had gone off and every reachable
attenuator dark (shutter closed at maximum attenuation), each role's first dark moment after
the fault polled every millisecond on the lab's state by ``StateWatch``,
when the run ended, and how (status and reason, and the status the store kept). Used by
tests/test_fault_paths.py (short timeouts) and benchmarks/bench_faults.py (the full table).
"""

from __future__ import annotations

import copy
import functools
import re
import threading
import time
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labrun.resources import find_file
from labrun.roles import ATTENUATOR_ROLES, SOURCE_ROLES
from labrun.vlab.lab import VirtualLab
from labrun.vlab.watch import StateWatch

if TYPE_CHECKING:
    from labrun.store import Store

OPERATOR = "T. Varga"  # invented
SOURCES = SOURCE_ROLES
ATTENUATORS = ATTENUATOR_ROLES


@dataclass(frozen=True)
class FaultRow:
    """One way a night goes wrong: a name, the role it takes away (if any), how to force it."""

    name: str
    what: str
    inject: Callable[[VirtualLab, Any], None]
    lost_role: str | None = None  # unreachable after the fault: its own state is not expected
    undo: Callable[[Any], None] | None = None  # after the run: give the store back


def _recentre_osa(lab: VirtualLab, _store: Any) -> None:
    """Someone re-centres the OSA from its front panel, 20 nm away from the tones."""
    with lab.state.lock:
        lab.state.osa.center_nm += 20.0


_HELD: dict[int, Any] = {}  # id(store) -> what holds the fault (a lock, a listener)


def _db_path(store: Any) -> str:
    """The SQLite file of a store."""
    from sqlalchemy.engine import make_url

    return str(make_url(store.url).database)


def _lock_db(_lab: VirtualLab, store: Any) -> None:
    """Another process's writer takes the database and keeps it (an exclusive transaction)."""
    import sqlite3

    con = sqlite3.connect(_db_path(store), isolation_level=None, check_same_thread=False)
    con.execute("BEGIN EXCLUSIVE")
    _HELD[id(store)] = con


def _unlock_db(store: Any) -> None:
    con = _HELD.pop(id(store), None)
    if con is not None:
        con.execute("ROLLBACK")
        con.close()


def _fill_disk(_lab: VirtualLab, store: Any) -> None:
    """The disk fills up: every write fails as SQLite reports it (SQLITE_FULL's message)."""
    import sqlite3

    from sqlalchemy import event

    def full(_conn: Any, _cursor: Any, statement: str, *_args: Any) -> None:
        if statement.lstrip().upper().startswith(("INSERT", "UPDATE", "DELETE")):
            raise sqlite3.OperationalError("database or disk is full")

    event.listen(store.engine, "before_cursor_execute", full)
    _HELD[id(store)] = full


def _free_disk(store: Any) -> None:
    from sqlalchemy import event

    full = _HELD.pop(id(store), None)
    if full is not None:
        event.remove(store.engine, "before_cursor_execute", full)


ROWS: dict[str, FaultRow] = {row.name: row for row in (
    FaultRow("osa-hung", "OSA stops answering (accepts, never replies)",
             lambda lab, _s: lab.hang("osa"), "osa"),
    FaultRow("osa-gone", "OSA refuses connections", lambda lab, _s: lab.refuse("osa"), "osa"),
    FaultRow("osa-recentred", "trace cannot be reduced (OSA re-centred from its front panel)",
             _recentre_osa),
    FaultRow("laser_b-hung", "laser_b stops answering (accepts, never replies)",
             lambda lab, _s: lab.hang("laser_b"), "laser_b"),
    FaultRow("laser_b-gone", "laser_b refuses connections",
             lambda lab, _s: lab.refuse("laser_b"), "laser_b"),
    FaultRow("db-locked", "database locked by another writer", _lock_db, undo=_unlock_db),
    FaultRow("db-full", "database disk full", _fill_disk, undo=_free_disk),
)}


@dataclass
class Measured:
    """One row of the table: seconds from the fault (None: never within the run)."""

    fault: str
    sources_off_s: float | None
    shutters_closed_s: float | None
    run_end_s: float
    status: str
    reason: str | None
    stored_status: str | None
    fallback_status: str | None  # the final status waiting in the fallback record, if any
    timeout_s: float          # the faulted instrument's exchange timeout
    give_up_s: float          # the retry policy's stated total time
    points_done: int
    extra: dict[str, Any] = field(default_factory=dict)


def _shipped(name: str, kind: str) -> Path:
    """A file shipped with labrun (FileNotFoundError if the installation lacks it)."""
    path = find_file(name, kind)
    if path is None:
        raise FileNotFoundError(f"{kind}/{name} is not shipped with this labrun")
    return path


def scenario() -> dict[str, Any]:
    """The shipped default scenario, realism off (deterministic)."""
    path = _shipped("default-scenario.toml", "sim_instruments")
    data = copy.deepcopy(tomllib.loads(path.read_text(encoding="utf-8")))
    data["realism"]["enabled"] = False
    return data


def plan_text(n_points: int) -> str:
    """An equal-power sweep at 1550 nm, 100 GHz spacing (invented lab values)."""
    powers = ", ".join(f"{-5.0 + 10.0 * i / max(n_points - 1, 1):.4f}" for i in range(n_points))
    return f"""[plan]
name = "fault path sweep"
spool = "HNLF-C09"
orders = 2

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
pol_angles_deg = [0.0, 0.0, 0.0]

[axes.power_a_dbm]
values = [{powers}]

[axes.power_b_dbm]
values = [{powers}]

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
"""


def write_bench(lab: VirtualLab, folder: Path, timeouts_ms: dict[str, int]) -> Path:
    """The lab's bench, each profile named in ``timeouts_ms`` copied with that timeout."""
    bench = lab.write_bench(folder / "bench.toml")
    text = bench.read_text(encoding="utf-8")
    for name, ms in timeouts_ms.items():
        src = _shipped(f"{name}.toml", "drivers").read_text(encoding="utf-8")
        copy_path = folder / f"timed-{name}.toml"
        copy_path.write_text(re.sub(r"timeout_ms = \d+", f"timeout_ms = {int(ms)}",
                                    src.replace(f'name = "{name}"', f'name = "timed-{name}"')),
                             encoding="utf-8")
        text = text.replace(f'profile = "{name}"', f'profile = "{copy_path}"')
    bench.write_text(text, encoding="utf-8")
    return bench


def _points_stored(store: Store) -> int:
    """Points stored in the latest run (-1 before any run row exists)."""
    run_id = store.latest_run_id()
    return -1 if run_id is None else store.count_points(run_id)


def _last(watch: StateWatch, roles: list[str]) -> float | None:
    """When the last of ``roles`` first went dark after the fault (None: one never did)."""
    times = [watch.after(r) for r in roles]
    found = [t for t in times if t is not None]
    return None if len(found) < len(times) else max(found, default=0.0)


def measure(row: FaultRow, folder: Path, *, timeouts_ms: dict[str, int] | None = None,
            policy: Any = None, n_points: int = 400, after_points: int = 3,
            busy_timeout_ms: int | None = None, seams: Any = None) -> Measured:
    """Run ``n_points`` on a fresh virtual lab, force ``row`` once ``after_points`` are stored,
    and time the way out from the fault against the lab's own state. ``busy_timeout_ms``:
    how long SQLite waits for a lock (default: the store's own); ``seams``: the engine's
    (``labrun.engine.Seams``; default the real ones)."""
    import labrun.store.db as store_db

    saved = store_db.BUSY_TIMEOUT_MS
    if busy_timeout_ms is not None:
        store_db.BUSY_TIMEOUT_MS = busy_timeout_ms
    try:
        return _measure(row, folder, timeouts_ms=timeouts_ms, policy=policy,
                        n_points=n_points, after_points=after_points, seams=seams)
    finally:
        store_db.BUSY_TIMEOUT_MS = saved


def _measure(row: FaultRow, folder: Path, *, timeouts_ms: dict[str, int] | None,
             policy: Any, n_points: int, after_points: int, seams: Any) -> Measured:
    """``measure`` with the store's busy timeout already set."""
    from labrun.bench import load_bench
    from labrun.engine import run_plan
    from labrun.faults import RetryPolicy, attempt_bound_s, point_bound_s
    from labrun.plan import load_plan
    from labrun.runstore import read_fallback
    from labrun.store import open_store

    folder.mkdir(parents=True, exist_ok=True)
    policy = policy or RetryPolicy()
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, folder, timeouts_ms or {}))
        plan_path = folder / "plan.toml"
        plan_path.write_text(plan_text(n_points), encoding="utf-8")
        plan = load_plan(plan_path)
        store = open_store(folder / "runs.db")
        sources = [r for r in SOURCES if r in lab.servers and r != row.lost_role]
        shutters = [r for r in ATTENUATORS if r in lab.servers and r != row.lost_role]
        watch = StateWatch({r: functools.partial(lab.role_dark, r) for r in sources + shutters},
                           step_s=0.001)
        fault_at: dict[str, float] = {}

        def force_fault() -> None:
            while _points_stored(store) < after_points:
                if "end" in fault_at:
                    return
                time.sleep(0.005)
            fault_at["t"] = time.monotonic()
            row.inject(lab, store)
            watch.arm(fault_at["t"])

        thread = threading.Thread(target=force_fault, name="force-fault", daemon=True)
        thread.start()
        try:
            out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True,
                           ack_safety=True, progress=False, policy=policy, seams=seams)
        finally:
            fault_at["end"] = time.monotonic()
            thread.join()
            time.sleep(0.02)  # one more poll of the lab's state
            watch.stop()
            if row.undo is not None:
                row.undo(store)
        t0 = fault_at.get("t", fault_at["end"])
        if row.name.startswith("db-"):
            import labrun.store.db as store_db

            timeout_s = store_db.BUSY_TIMEOUT_MS / 1000.0
        else:
            timeout_s = bench.instruments[row.lost_role or "osa"].profile.timeout_ms / 1000.0
        point_s = point_bound_s(sum(op.settle_s for spec in bench.instruments.values()
                                    for op in spec.profile.operations.values())
                                * bench.settle_scale, 1, bench)
        run = store.get_run(out.run_id)
        return Measured(
            fault=row.name, sources_off_s=_last(watch, sources),
            shutters_closed_s=_last(watch, shutters), run_end_s=fault_at["end"] - t0,
            status=out.status, reason=out.reason,
            stored_status=None if run is None else run.status,
            fallback_status=read_fallback(store.url).get(out.run_id, {}).get("status"),
            timeout_s=timeout_s,
            give_up_s=policy.give_up_s(attempt_bound_s(point_s, bench), bench.settle_scale),
            points_done=out.points_done,
            extra={kind: len(store.events(out.run_id, [kind])) for kind in ("dark", "relight")}
            | {"reason_stored": None if run is None else run.reason})
