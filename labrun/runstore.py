"""Owns the run's writes when the database fails: brief retries, the bench darkened at the first
failure, and a fallback record next to the database for what could not be written.

``RunStore`` wraps a ``Store`` for the engine. A database error that may pass (SQLAlchemy's
``OperationalError`` or ``InterfaceError``: disk full, locked by another writer, a lost server
connection; any backend), or a write still waiting after ``SLOW_S`` (a lock, a stalled server),
calls ``on_fault`` once (the engine darkens every source); a failed call is retried
``tries`` times in all ``pause_s`` apart, and then becomes ``StoreFault``: the run stops, one
line, no traceback. When even the final status cannot be written, ``write_fallback`` appends it
to ``<database file>.unwritten.jsonl`` (for a server database: ``labrun-unwritten.jsonl`` in
the current folder); ``labrun status`` shows it and ``labrun resume`` writes it into the
database before anything else, so no run is left ``running`` without a reason.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

from labrun.errors import LabrunError

if TYPE_CHECKING:
    from labrun.store.kinds import EventKind, RunStatus
    from labrun.store.models import Run

log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())  # library: shown only when the application configures logging

TRIES = 2       # one retry: a locked database already waited its busy timeout once
PAUSE_S = 0.5   # before the retry
SLOW_S = 2.0    # a write still waiting after this (a lock, a stalled server) darkens the bench
FALLBACK_SUFFIX = ".unwritten.jsonl"
SERVER_FALLBACK = "labrun-unwritten.jsonl"


class StoreFault(LabrunError):
    """The run store failed beyond its brief retries (exit 1, one line)."""


def is_store_fault(exc: BaseException) -> bool:
    """True for a database error that says nothing about the data (a full disk, a lock, a lost
    connection) rather than a bug or a constraint: those are retried briefly, then end the run."""
    from sqlalchemy.exc import DBAPIError, InterfaceError, OperationalError

    if isinstance(exc, OperationalError | InterfaceError):
        return True
    return isinstance(exc, DBAPIError) and bool(exc.connection_invalidated)


def describe(exc: BaseException) -> str:
    """'database error: <the driver's first line>' for a store fault."""
    orig = getattr(exc, "orig", None) or exc
    first = (str(orig).strip().splitlines() or [type(orig).__name__])[0]
    return f"database error ({type(orig).__name__}: {first[:160]})"


class RunStore:
    """A Store whose calls retry store faults briefly, then raise StoreFault."""

    def __init__(self, store: Any, *, on_fault: Callable[[BaseException], None] | None = None,
                 tries: int = TRIES, pause_s: float = PAUSE_S, slow_s: float = SLOW_S):
        self.store = store
        self.on_fault = on_fault
        self.tries = max(1, tries)
        self.pause_s = pause_s
        self.slow_s = slow_s
        self._told = threading.Event()  # on_fault already called for the current call
        self.faults: list[str] = []  # one line per failed call, for the fallback record

    # ---- the store's calls the engine makes, typed (each retried as ``call`` says) ----------
    @property
    def url(self) -> str:
        """The wrapped store's URL (password hidden)."""
        return str(self.store.url)

    def create_run(self, **fields: Any) -> int:
        """``Store.create_run``: insert a run, its id."""
        return int(self.call("create_run", self.store.create_run, (), fields))

    def get_run(self, run_id: int) -> Run | None:
        """``Store.get_run``: the run row, or None."""
        return cast("Run | None", self.call("get_run", self.store.get_run, (run_id,), {}))

    def update_run(self, run_id: int, **fields: Any) -> None:
        """``Store.update_run``: set some columns of a run."""
        self.call("update_run", self.store.update_run, (run_id,), fields)

    def set_status(self, run_id: int, status: RunStatus, reason: str | None = None, *,
                   finished: bool = False) -> None:
        """``Store.set_status``: a run's status and reason (``finished``: and finished_at)."""
        self.call("set_status", self.store.set_status, (run_id, status, reason),
                  {"finished": finished})

    def heartbeat(self, run_id: int) -> None:
        """``Store.heartbeat``: the run process is alive now."""
        self.call("heartbeat", self.store.heartbeat, (run_id,), {})

    def spool_id(self, label: str, **fields: Any) -> int:
        """``Store.spool_id``: the spool's id, created when new."""
        return int(self.call("spool_id", self.store.spool_id, (label,), fields))

    def add_event(self, run_id: int, kind: EventKind | str, message: str = "",
                  **fields: Any) -> None:
        """``Store.add_event``: one event of a run (role, point_key, data as keywords)."""
        self.call("add_event", self.store.add_event, (run_id, kind, message), fields)

    def add_point(self, run_id: int, **row: Any) -> Any:
        """``Store.add_point``: one point with its traces and lines, in one transaction."""
        return self.call("add_point", self.store.add_point, (run_id,), row)

    def completed_keys(self, run_id: int) -> set[str]:
        """``Store.completed_keys``: keys of the points a run has stored."""
        return set(self.call("completed_keys", self.store.completed_keys, (run_id,), {}))

    def __getattr__(self, name: str) -> Any:
        """Any other attribute of the wrapped store (a call through ``call``, untyped)."""
        attr = getattr(self.store, name)
        if not callable(attr):
            return attr

        def call(*args: Any, **kwargs: Any) -> Any:
            return self.call(name, attr, args, kwargs)

        return call

    def tell(self, exc: BaseException) -> None:
        """Call ``on_fault`` once per call (from the slow-write timer or the failure)."""
        if self.on_fault is None or self._told.is_set():
            return
        self._told.set()
        try:
            self.on_fault(exc)  # the engine darkens the bench
        except Exception as hook_error:  # noqa: BLE001 - the fault still counts
            log.error("store fault hook failed: %s", hook_error)

    def call(self, name: str, fn: Callable[..., Any], args: tuple[Any, ...],
             kwargs: dict[str, Any]) -> Any:
        """``fn(*args, **kwargs)`` with brief retries of store faults; a call still waiting
        after ``slow_s`` (a lock, a stalled server) calls ``on_fault`` from a timer meanwhile."""
        self._told.clear()
        if self.on_fault is None or self.slow_s <= 0:
            return self._call(name, fn, args, kwargs)
        from labrun.deadlines import Alarm  # one watcher thread, not a Timer per write

        slow = TimeoutError(f"{name} still waiting after {self.slow_s:g} s")
        with Alarm(self.slow_s, lambda: self.tell(slow)):
            return self._call(name, fn, args, kwargs)

    def _call(self, name: str, fn: Callable[..., Any], args: tuple[Any, ...],
              kwargs: dict[str, Any]) -> Any:
        """The tries of ``call``."""
        for attempt in range(1, self.tries + 1):
            try:
                return fn(*args, **kwargs)
            except Exception as exc:
                if not is_store_fault(exc):
                    raise
                line = describe(exc)
                self.faults.append(f"{name}: {line}")
                log.warning("store %s failed (try %d of %d): %s", name, attempt, self.tries, line)
                self.tell(exc)  # darken before retrying (unless the slow-write timer did)
                if attempt == self.tries:
                    raise StoreFault(line) from None
                time.sleep(self.pause_s)
        raise AssertionError("unreachable")


def as_run_store(store: Any) -> RunStore:
    """``store`` wrapped once in a RunStore."""
    return store if isinstance(store, RunStore) else RunStore(store)


def fallback_path(url: str) -> Path:
    """Where the record of what could not be written goes: beside a SQLite file, else here."""
    from labrun.store.statusview import is_sqlite, sqlite_database  # no SQLAlchemy needed

    if "://" in url and is_sqlite(url):
        database = sqlite_database(url)
        if database and database != ":memory:":
            db = Path(database)
            return db.with_name(db.name + FALLBACK_SUFFIX)
    return Path.cwd() / SERVER_FALLBACK


def write_fallback(url: str, record: dict[str, Any]) -> Path | None:
    """Append one run's final record (status, reason, events) as a JSON line; its path, or None
    when even that failed (the message then goes to the log)."""
    path = fallback_path(url)
    line = json.dumps({**record, "store": url,
                       "written_at": datetime.now(UTC).isoformat()}, default=str)
    try:
        with open(path, "a", encoding="utf-8") as fh:
            fh.write(line + "\n")
            fh.flush()
            os.fsync(fh.fileno())
    except OSError as exc:
        log.error("cannot write the fallback record %s (%s): %s", path, exc, line)
        return None
    return path


def read_fallback(url: str) -> dict[int, dict[str, Any]]:
    """The records waiting in the fallback file, the latest per run id."""
    path = fallback_path(url)
    out: dict[int, dict[str, Any]] = {}
    with contextlib.suppress(OSError):
        for text in path.read_text(encoding="utf-8").splitlines():
            with contextlib.suppress(ValueError, TypeError, KeyError):
                record = json.loads(text)
                out[int(record["run_id"])] = record
    return out


def apply_fallback(store: Any) -> list[int]:
    """Write the waiting records into the database (events, then status and reason) and drop
    the file once all are in; the run ids written. A store fault leaves the file as it is."""
    records = read_fallback(store.url)
    if not records:
        return []
    for run_id, record in records.items():
        if store.get_run(run_id) is None:
            continue
        for kind, message in record.get("events", []):
            store.add_event(run_id, kind, message, data={"from_fallback": True})
        store.set_status(run_id, record["status"], record.get("reason"), finished=True)
    with contextlib.suppress(OSError):
        fallback_path(store.url).unlink()
    return sorted(records)
