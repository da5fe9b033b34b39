"""What ``labrun status`` reads from the run store, without SQLAlchemy's ORM.

A SQLite store (a file path or a ``sqlite://`` URL) is read with the standard library's sqlite3
over a read-only connection: no SQLAlchemy import at all, which keeps ``labrun status`` well under
its 0.3 s. Any other URL (PostgreSQL) is opened as every other command opens it
(``open_existing_store``: the same checks and messages) and read with the same SQL through
SQLAlchemy Core. Either way the result has the shape of ``Store.summary`` (rows as plain objects
with the ORM's attribute names), so ``labrun.cli.status`` formats both alike; a test compares the
two on one database.
"""

from __future__ import annotations

import json
import os
import sqlite3
import statistics
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import unquote

from labrun.errors import InputError
from labrun.store.revisions import BASELINE, require_head

BUSY_TIMEOUT_S = 15.0  # as the store's own connections (labrun.store.db.BUSY_TIMEOUT_MS)

Query = Callable[[str, dict[str, Any]], list[tuple[Any, ...]]]


@dataclass(frozen=True)
class RunView:
    """The columns of a run that status shows."""

    id: int
    status: str
    reason: str | None
    plan_name: str | None
    operator: str | None
    bench_name: str | None
    settings: Any
    points_total: int | None
    started_at: datetime | None
    finished_at: datetime | None
    heartbeat_at: datetime | None
    replay_of: int | None


@dataclass(frozen=True)
class PointView:
    """The last stored point of a run."""

    id: int
    key: str
    index: int
    setpoint: Any
    finished_at: datetime


@dataclass(frozen=True)
class LineView:
    """One line of the last point's output trace."""

    kind: str
    side: str
    order: int
    power_dbm: float | None
    detected: bool
    upper_limit_dbm: float | None


@dataclass(frozen=True)
class FaultView:
    """The last fault (or guardian) event of a run."""

    at: datetime
    role: str | None
    message: str


# One SQL text for both backends: named parameters (:name) are what sqlite3 and SQLAlchemy's
# text() both take; "index" and "order" are quoted (reserved words in SQL).
_RUN = ("SELECT id, status, reason, plan_name, operator, bench_name, settings, points_total, "
        "started_at, finished_at, heartbeat_at, replay_of FROM runs WHERE id = :run_id")
_LATEST = "SELECT max(id) FROM runs"
_COUNT = "SELECT count(id) FROM points WHERE run_id = :run_id"
_TIMES = ("SELECT finished_at FROM points WHERE run_id = :run_id ORDER BY id DESC "
          "LIMIT :n")
_LAST = ('SELECT id, key, "index", setpoint, finished_at FROM points WHERE run_id = :run_id '
         "ORDER BY id DESC LIMIT 1")
_LINES = ('SELECT lines.kind, lines.side, lines."order", lines.power_dbm, lines.detected, '
          "lines.upper_limit_dbm FROM lines LEFT OUTER JOIN traces ON traces.id = lines.trace_id "
          "WHERE lines.point_id = :point_id AND (traces.kind IS NULL OR traces.kind = 'output') "
          "ORDER BY lines.id")
_FAULTS = "SELECT count(id) FROM events WHERE run_id = :run_id AND kind = 'fault'"
_LAST_EVENT = ("SELECT at, role, message FROM events WHERE run_id = :run_id AND kind = :kind "
               "ORDER BY id DESC LIMIT 1")


def _utc(value: Any) -> datetime | None:
    """A stored time as timezone-aware UTC (SQLite keeps ISO text without a zone, as UTC)."""
    if value is None:
        return None
    when = value if isinstance(value, datetime) else datetime.fromisoformat(str(value))
    return when.replace(tzinfo=UTC) if when.tzinfo is None else when.astimezone(UTC)


def _json(value: Any) -> Any:
    """A JSON column's value (SQLite returns its text, PostgreSQL drivers the parsed value)."""
    return json.loads(value) if isinstance(value, str | bytes) else value


def _float(value: Any) -> float | None:
    """A FLOAT column as float or None."""
    return None if value is None else float(value)


def _last_event(query: Query, run_id: int, kind: str) -> FaultView | None:
    """The run's latest event of ``kind`` (a fault, the guardian's darkening), or None."""
    rows = query(_LAST_EVENT, {"run_id": run_id, "kind": kind})
    return None if not rows else FaultView(at=_utc(rows[0][0]),  # type: ignore[arg-type]
                                           role=rows[0][1], message=rows[0][2])


def latest_run_id(query: Query) -> int | None:
    """Id of the most recently created run, or None on an empty store."""
    (found,), = query(_LATEST, {})
    return None if found is None else int(found)


def summary(query: Query, run_id: int, *, recent: int = 20) -> dict[str, Any] | None:
    """What ``labrun status`` shows, as ``Store.summary`` returns it: run, counts, pace, last
    point and its output lines, faults, the guardian watcher's last event (rows as the *View
    classes above)."""
    rows = query(_RUN, {"run_id": run_id})
    if not rows:
        return None
    r = rows[0]
    run = RunView(id=int(r[0]), status=r[1], reason=r[2], plan_name=r[3], operator=r[4],
                  bench_name=r[5], settings=_json(r[6]), points_total=r[7],
                  started_at=_utc(r[8]), finished_at=_utc(r[9]), heartbeat_at=_utc(r[10]),
                  replay_of=r[11])
    (done,), = query(_COUNT, {"run_id": run_id})
    times = [_utc(t) for (t,) in query(_TIMES, {"run_id": run_id, "n": recent + 1})]
    last_rows = query(_LAST, {"run_id": run_id})
    last = None
    if last_rows:
        p = last_rows[0]
        last = PointView(id=int(p[0]), key=p[1], index=int(p[2]), setpoint=_json(p[3]),
                         finished_at=_utc(p[4]))  # type: ignore[arg-type]
    last_lines = [] if last is None else [
        LineView(kind=ln[0], side=ln[1], order=int(ln[2]), power_dbm=_float(ln[3]),
                 detected=bool(ln[4]), upper_limit_dbm=_float(ln[5]))
        for ln in query(_LINES, {"point_id": last.id})]
    (faults,), = query(_FAULTS, {"run_id": run_id})
    last_fault = _last_event(query, run_id, "fault")
    guardian = _last_event(query, run_id, "guardian")
    gaps = [(a - b).total_seconds() for a, b in zip(times, times[1:], strict=False)
            if a is not None and b is not None]
    return {
        "run": run, "points_done": int(done or 0),
        "seconds_per_point": float(statistics.median(gaps)) if gaps else None,
        "last_point": last, "last_lines": last_lines, "faults": int(faults or 0),
        "last_fault": last_fault, "guardian": guardian,
    }


def sqlite_database(url: str) -> str | None:
    """The database file of a ``sqlite://`` URL as SQLAlchemy reads it (None: in memory or no
    file); the URL must start with ``sqlite``."""
    rest = url.split("://", 1)[1] if "://" in url else ""
    rest = rest.split("?", 1)[0]
    if rest.startswith("/"):
        rest = rest[1:]
    return unquote(rest) or None


def is_sqlite(url_or_path: str | os.PathLike[str]) -> bool:
    """True for a file path or a ``sqlite`` URL (what this module reads without SQLAlchemy)."""
    text = os.fspath(url_or_path)
    if "://" not in text:
        return True
    scheme = text.split("://", 1)[0].lower()
    return scheme == "sqlite" or scheme.startswith("sqlite+")


def sqlite_location(url_or_path: str | os.PathLike[str]) -> tuple[str, Path | None]:
    """(the store's URL as ``open_store`` names it, its database file or None) for a SQLite
    path or URL; a path whose folder does not exist is an InputError (as ``store_url``)."""
    text = os.fspath(url_or_path)
    if "://" in text:
        db = sqlite_database(text)
        return text, None if db is None or db == ":memory:" else Path(db)
    path = Path(text).expanduser().resolve()
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", file=text, field="--db")
    return f"sqlite:///{path}", path


def _sqlite_query(con: sqlite3.Connection) -> Query:
    """A Query over a sqlite3 connection."""
    def query(sql: str, params: dict[str, Any]) -> list[tuple[Any, ...]]:
        return con.execute(sql, params).fetchall()
    return query


def _sqlite_revision(con: sqlite3.Connection) -> str | None:
    """The schema revision of a SQLite store (BASELINE without Alembic's table), None without
    a runs table."""
    tables = {name for (name,) in con.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table'")}
    if "runs" not in tables:
        return None
    if "alembic_version" in tables:
        found = [v for (v,) in con.execute("SELECT version_num FROM alembic_version")]
        if len(found) == 1:
            return str(found[0])
    return BASELINE


def read_status(url_or_path: str | os.PathLike[str], run_id: int | None
                ) -> tuple[str, dict[str, Any] | None, int | None]:
    """(the store's URL, the summary of ``run_id`` or of the latest run, that run's id).

    The store must exist and be at this labrun's schema revision (the same refusals as
    ``open_existing_store``, exit 2); the summary is None when the run is not there, the id None
    on a store without runs. Never writes: SQLite is opened read-only.
    """
    if not is_sqlite(url_or_path):
        return _read_with_sqlalchemy(url_or_path, run_id)
    where = os.fspath(url_or_path)
    url, path = sqlite_location(url_or_path)
    if path is None or not path.is_file():
        raise InputError("no run store here (no such database file); give --db, or start "
                         "a run with 'labrun run'", file=where, field="--db")
    try:
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True,
                              timeout=BUSY_TIMEOUT_S)
    except sqlite3.Error:
        raise InputError("not a labrun run store (no runs table)", file=where,
                         field="--db") from None
    try:
        try:
            revision = _sqlite_revision(con)
        except sqlite3.DatabaseError:  # not a database at all
            revision = None
        if revision is None:
            raise InputError("not a labrun run store (no runs table)", file=where, field="--db")
        require_head(revision, where)
        return _summarise(_sqlite_query(con), url, run_id, where)
    except sqlite3.Error as exc:
        raise InputError(f"cannot read the database ({type(exc).__name__}: {exc})",
                         file=where, field="--db") from None
    finally:
        con.close()


def _summarise(query: Query, url: str, run_id: int | None, where: str
               ) -> tuple[str, dict[str, Any] | None, int | None]:
    """The summary of ``run_id`` (or the latest run) through ``query``."""
    if run_id is None:
        run_id = latest_run_id(query)
        if run_id is None:
            raise InputError("the store has no runs yet", file=where, field="--db")
    return url, summary(query, run_id), run_id


def _read_with_sqlalchemy(url_or_path: str | os.PathLike[str], run_id: int | None
                          ) -> tuple[str, dict[str, Any] | None, int | None]:
    """read_status for a server database: opened as every command opens it, read with the
    same SQL through SQLAlchemy Core."""
    from sqlalchemy import text

    from labrun.store.db import open_existing_store

    store = open_existing_store(url_or_path)
    try:
        with store.engine.connect() as conn:
            def query(sql: str, params: dict[str, Any]) -> list[tuple[Any, ...]]:
                return [tuple(row) for row in conn.execute(text(sql), params)]
            return _summarise(query, store.url, run_id, os.fspath(url_or_path))
    finally:
        store.close()

