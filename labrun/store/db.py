"""Open the run store and the few operations the engine and ``labrun status`` need.

``open_store`` takes a SQLAlchemy URL or a file path (a path means SQLite). SQLite is opened in
WAL mode with foreign keys on and a busy timeout, so ``labrun status`` in another process reads
while a run writes. Each point, with its traces and lines, is written in one transaction.
"""

from __future__ import annotations

import math
import os
import statistics
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

from sqlalchemy import (
    Engine,
    Table,
    bindparam,
    create_engine,
    event,
    func,
    insert,
    inspect,
    or_,
    select,
    update,
)
from sqlalchemy.engine import CursorResult, make_url
from sqlalchemy.exc import ArgumentError, IntegrityError, SQLAlchemyError
from sqlalchemy.orm import Session, sessionmaker

from labrun.errors import InputError
from labrun.store import DEFAULT_DB, schema
from labrun.store.models import (
    Base,
    Event,
    EventKind,
    Line,
    Point,
    Run,
    RunStatus,
    Spool,
    Trace,
    utcnow,
)
from labrun.store.revisions import older_refusal
from labrun.store.revisions import require_known as _require_known
from labrun.store.tracecodec import encode_y
from labrun.store.tracedata import TraceData as TraceData  # re-exported: its home before

if TYPE_CHECKING:  # numpy is imported where traces are encoded: `labrun status` needs none
    import numpy as np

BUSY_TIMEOUT_MS = 15_000  # a reader or writer waits this long for a lock before failing


def store_url(url_or_path: str | os.PathLike[str]) -> str:
    """A SQLAlchemy URL for ``url_or_path``: URLs pass through, anything else is a SQLite file."""
    text = os.fspath(url_or_path)
    if "://" in text:
        try:
            make_url(text)
        except ArgumentError as exc:
            raise InputError(f"not a database URL: {exc}", field="--db") from None
        return text
    path = Path(text).expanduser().resolve()
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", file=text, field="--db")
    return f"sqlite:///{path}"


def _sqlite_pragmas(dbapi_conn: Any, _record: Any) -> None:
    """WAL (readers never block the writer), foreign keys, and a busy timeout on each connection."""
    cur = dbapi_conn.cursor()
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA foreign_keys=ON")
    cur.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
    # NORMAL in WAL mode: a commit survives a process crash; only an OS crash may lose the last
    # few commits (SQLite documentation, "WAL mode").
    cur.execute("PRAGMA synchronous=NORMAL")
    cur.close()


def encode_x(x: np.ndarray) -> tuple[float, float, int, bytes | None]:
    """(start, stop, n, blob): blob is None when x is a linear grid (then 3 numbers rebuild it).

    An OSA x axis is a linear grid set by centre, span and points; when it arrives as float32
    (also when already widened to float64), its values sit within float32 rounding of that grid,
    which counts as linear too.
    """
    import numpy as np

    raw = np.asarray(x)
    xs = raw.astype(np.float64)
    n = int(xs.size)
    if n == 0:
        return 0.0, 0.0, 0, None
    start, stop = float(xs[0]), float(xs[-1])
    if n > 1:
        grid = np.linspace(start, stop, n)
        step = abs(stop - start) / (n - 1)
        tol = 1e-6 * step
        if raw.dtype == np.float32 or np.array_equal(xs, xs.astype(np.float32)):
            # float32 data: within one float32 ulp is what was received, rebuilt
            tol = max(tol, float(np.finfo(np.float32).eps) * float(np.max(np.abs(xs))))
        if step > 0 and np.max(np.abs(xs - grid)) <= tol:
            return start, stop, n, None
    return start, stop, n, xs.astype("<f8").tobytes()


class Store:
    """A handle on one run database: engine, sessions and the engine's write operations."""

    def __init__(self, engine: Engine):
        self.engine = engine
        self.url = engine.url.render_as_string(hide_password=True)
        self.sessions = sessionmaker(engine, expire_on_commit=False)
        self.upgraded_from: str | None = None  # schema revision before opening upgraded it

    @contextmanager
    def session(self) -> Iterator[Session]:
        """A session in one transaction: committed on success, rolled back on any exception."""
        with self.sessions.begin() as session:
            yield session

    def close(self) -> None:
        """Release every pooled connection."""
        self.engine.dispose()

    # ----- runs -------------------------------------------------------------------------------
    def create_run(self, **fields: Any) -> int:
        """Insert a run (fields of models.Run) and return its id."""
        with self.session() as s:
            run = Run(**fields)
            s.add(run)
            s.flush()
            return run.id

    def get_run(self, run_id: int) -> Run | None:
        """The run row (detached, attributes loaded), or None."""
        with self.session() as s:
            return s.get(Run, run_id)

    def latest_run_id(self) -> int | None:
        """Id of the most recently created run, or None on an empty store."""
        with self.session() as s:
            return s.scalar(select(func.max(Run.id)))

    def update_run(self, run_id: int, **fields: Any) -> None:
        """Set some columns of a run in their own transaction."""
        with self.session() as s:
            s.execute(update(Run).where(Run.id == run_id).values(**fields))

    def set_status(self, run_id: int, status: RunStatus, reason: str | None = None, *,
                   finished: bool = False) -> None:
        """Change a run's status (and reason); ``finished`` also stamps finished_at."""
        values: dict[str, Any] = {"status": status, "reason": reason, "heartbeat_at": utcnow()}
        if finished:
            values["finished_at"] = utcnow()
        self.update_run(run_id, **values)

    def heartbeat(self, run_id: int) -> None:
        """Record that the run process is alive now."""
        self.update_run(run_id, heartbeat_at=utcnow())

    def spool_id(self, label: str, **fields: Any) -> int:
        """Id of the spool with this label, creating it when new; ``fields`` (length_km, ...)
        fill only what the row does not say yet (``labrun spool set`` edits overwrite).

        Two rigs may create the same spool at once: the loser of the unique label re-reads.
        """
        for _ in range(3):
            try:
                with self.session() as s:
                    spool = s.scalar(select(Spool).where(Spool.label == label))
                    if spool is None:
                        spool = Spool(label=label, **fields)
                        s.add(spool)
                    else:
                        for name, value in fields.items():
                            if name == "params":  # entries the row has win
                                merged = {**(value or {}), **(spool.params or {})}
                                if merged != (spool.params or {}):
                                    spool.params = merged
                            elif getattr(spool, name) is None and value is not None:
                                setattr(spool, name, value)
                    s.flush()
                    return spool.id
            except IntegrityError:
                continue
        raise InputError(f"cannot record spool {label!r} (another process keeps changing it)",
                         field="spool")

    # ----- events -----------------------------------------------------------------------------
    def add_event(self, run_id: int, kind: EventKind | str, message: str = "", *,
                  role: str | None = None, point_key: str | None = None,
                  data: dict[str, Any] | None = None) -> None:
        """Log one event against a run, in its own transaction (``kind``: an EventKind or its
        string value, which is what the column stores)."""
        with self.engine.begin() as conn:
            conn.execute(insert(Event).values(
                run_id=run_id, at=utcnow(), kind=kind, role=role, point_key=point_key,
                message=message, data=data or {},
            ))

    def events(self, run_id: int, kinds: Sequence[str] | None = None) -> list[Event]:
        """Events of a run in time order, optionally only some kinds."""
        with self.session() as s:
            q = select(Event).where(Event.run_id == run_id)
            if kinds:
                q = q.where(Event.kind.in_(list(kinds)))
            return list(s.scalars(q.order_by(Event.id)))

    def summary(self, run_id: int, *, recent: int = 20) -> dict[str, Any] | None:
        """What ``labrun status`` shows: run row, counts, pace, last point and its lines, faults,
        the guardian watcher's last event."""
        with self.session() as s:
            run = s.get(Run, run_id)
            if run is None:
                return None
            done = int(s.scalar(select(func.count(Point.id)).where(Point.run_id == run_id)) or 0)
            times = list(s.scalars(select(Point.finished_at).where(Point.run_id == run_id)
                                   .order_by(Point.id.desc()).limit(recent + 1)))
            last = s.scalars(select(Point).where(Point.run_id == run_id)
                             .order_by(Point.id.desc()).limit(1)).first()
            last_lines = [] if last is None else list(s.scalars(  # spool output lines only
                select(Line).outerjoin(Trace, Trace.id == Line.trace_id)
                .where(Line.point_id == last.id,
                       or_(Trace.kind.is_(None), Trace.kind == "output"))
                .order_by(Line.id)))
            faults = int(s.scalar(select(func.count(Event.id)).where(
                Event.run_id == run_id, Event.kind == "fault")) or 0)
            last_fault = s.scalars(select(Event).where(Event.run_id == run_id,
                                                       Event.kind == "fault")
                                   .order_by(Event.id.desc()).limit(1)).first()
            guardian = s.scalars(select(Event).where(Event.run_id == run_id,
                                                     Event.kind == "guardian")
                                 .order_by(Event.id.desc()).limit(1)).first()
            gaps = [(a - b).total_seconds() for a, b in zip(times, times[1:], strict=False)]
            return {
                "run": run, "points_done": done,
                "seconds_per_point": float(statistics.median(gaps)) if gaps else None,
                "last_point": last, "last_lines": last_lines, "faults": faults,
                "last_fault": last_fault, "guardian": guardian,
            }

    # ----- points -----------------------------------------------------------------------------
    def completed_keys(self, run_id: int) -> set[str]:
        """Keys of the points already stored for a run (what a resume skips)."""
        with self.session() as s:
            return set(s.scalars(select(Point.key).where(Point.run_id == run_id)))

    def count_points(self, run_id: int) -> int:
        """How many points a run has stored."""
        with self.session() as s:
            return int(s.scalar(select(func.count(Point.id)).where(Point.run_id == run_id)) or 0)

    def add_point(self, run_id: int, *, key: str, index: int, setpoint: dict[str, Any],
                  traces: Sequence[TraceData], lines: Sequence[dict[str, Any]],
                  repeat: int = 0, is_reference: bool = False,
                  applied: dict[str, Any] | None = None, spacing_ghz: float | None = None,
                  floor_dbm: float | None = None, flags: Sequence[str] = (), attempts: int = 1,
                  started_at: datetime | None = None) -> int:
        """Write a point, its traces and its lines, and beat the heartbeat, in ONE transaction.

        Lines are dicts with the MeasuredLine fields; ``trace`` (index into ``traces``) links a
        line to its trace (default: the first). Raises IntegrityError on a duplicate key.
        """
        now = utcnow()
        with self.engine.begin() as conn:
            point_id = _new_id(conn.execute(_INSERT_POINT, {
                "run_id": run_id, "key": key, "index": index, "repeat": repeat,
                "is_reference": is_reference, "setpoint": setpoint, "applied": applied or {},
                "spacing_ghz": _finite_or_none(spacing_ghz),
                "floor_dbm": _finite_or_none(floor_dbm), "flags": list(flags),
                "attempts": attempts, "started_at": started_at, "finished_at": now,
            }))
            trace_ids = []
            for tr in traces:
                x_start, x_stop, n, x_blob = encode_x(tr.x)
                y_blob, encoding = encode_y(tr.y)
                trace_ids.append(_new_id(conn.execute(_INSERT_TRACE, {
                    "point_id": point_id, "kind": tr.kind, "x_unit": tr.x_unit, "n": n,
                    "x_start": x_start, "x_stop": x_stop, "x_data": x_blob,
                    "y_data": y_blob, "encoding": encoding, "rbw_nm": tr.rbw_nm,
                    "settings": tr.settings,
                })))
            rows = [_line_row(point_id, trace_ids, ln) for ln in lines]
            if rows:
                conn.execute(_INSERT_LINE, rows)
            conn.execute(_BEAT, {"b_run_id": run_id, "b_now": now})
        return int(point_id)


def _new_id(result: CursorResult[Any]) -> Any:
    """The primary key an INSERT of one row gave it."""
    key = result.inserted_primary_key
    if key is None:
        raise RuntimeError("the database returned no primary key for the new row")
    return key[0]


# Statements built once: executing them with parameters reuses SQLAlchemy's compiled cache,
# which keeps the per-point commit well under a millisecond of Python work.
_INSERT_POINT = cast(Table, Point.__table__).insert()
_INSERT_TRACE = cast(Table, Trace.__table__).insert()
_INSERT_LINE = cast(Table, Line.__table__).insert()
_BEAT = (
    cast(Table, Run.__table__).update()
    .where(Run.__table__.c.id == bindparam("b_run_id"))
    .values(heartbeat_at=bindparam("b_now"))
)

_LINE_FIELDS = ("kind", "side", "order", "freq_thz", "wavelength_nm", "power_dbm", "floor_dbm",
                "snr_db", "detected", "upper_limit_dbm")


def _finite_or_none(value: Any) -> Any:
    """NaN and infinities become NULL (JSON and SQL have no portable NaN)."""
    if isinstance(value, float) or getattr(getattr(value, "dtype", None), "kind", "") == "f":
        v = float(value)  # also a numpy floating scalar (numpy itself need not be imported)
        return v if math.isfinite(v) else None
    return value


def _line_row(point_id: int, trace_ids: Sequence[int], line: dict[str, Any]) -> dict[str, Any]:
    """A row of the lines table from a MeasuredLine-like dict."""
    row = {name: _finite_or_none(line.get(name)) for name in _LINE_FIELDS}
    row["detected"] = bool(line.get("detected", True))
    row["order"] = int(row["order"] or 0)
    t = line.get("trace", 0)
    row["trace_id"] = trace_ids[t] if trace_ids and t is not None else None
    row["point_id"] = point_id
    return row


def open_existing_store(url_or_path: str | os.PathLike[str] = DEFAULT_DB, *,
                        upgrade: bool = False) -> Store:
    """Open a run store that must already exist (status, resume): never creates a database.

    A missing SQLite file, a file that is not SQLite, or a database without labrun's tables is
    an InputError naming ``--db`` (exit 2); a SQLite file is checked read-only before opening.
    An older schema is upgraded when ``upgrade`` (commands that write), otherwise refused with
    the ``labrun db upgrade`` hint; a newer schema is always refused (both exit 2).
    """
    url = store_url(url_or_path)
    where = os.fspath(url_or_path)
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        path = Path(parsed.database or "")
        if not parsed.database or parsed.database == ":memory:" or not path.is_file():
            raise InputError("no run store here (no such database file); give --db, or start "
                             "a run with 'labrun run'", file=where, field="--db")
        if not _sqlite_has_runs(path):
            raise InputError("not a labrun run store (no runs table)", file=where, field="--db")
        store = open_store(url, create=False)
        _check_revision(store, where, upgrade=upgrade)
        return store
    store = open_store(url, create=False)
    try:
        found = inspect(store.engine).has_table(Run.__tablename__)
    except SQLAlchemyError as exc:
        store.close()
        raise InputError(f"cannot open the database ({type(exc).__name__})", file=where,
                         field="--db") from None
    if not found:
        store.close()
        raise InputError("not a labrun run store (no runs table)", file=where, field="--db")
    _check_revision(store, where, upgrade=upgrade)
    return store


def _check_revision(store: Store, where: str, *, upgrade: bool) -> None:
    """Refuse (or, with ``upgrade``, upgrade) a store whose schema is not this labrun's HEAD."""
    with store.engine.connect() as conn:
        revision = schema.revision_of(conn)
    if revision == schema.HEAD:
        return
    try:
        _require_known(revision, where)
        if not upgrade:
            raise older_refusal(revision, where)
        store.upgraded_from = schema.upgrade(store.engine)[0]
    except BaseException:
        store.close()
        raise


def _prepare_schema(engine: Engine, where: str) -> None:
    """Create the tables of a new database (stamped HEAD), or upgrade an older one."""
    with engine.connect() as conn, conn.begin():
        schema.lock(conn)
        revision = schema.revision_of(conn)
        if revision == schema.SchemaState.EMPTY:
            Base.metadata.create_all(conn)
            schema.stamp(conn, schema.HEAD)
            return
    if revision == schema.HEAD:
        return
    _require_known(revision, where)
    schema.upgrade(engine)


def _sqlite_has_runs(path: Path) -> bool:
    """True when the SQLite file at ``path`` has a runs table (opened read-only, unchanged)."""
    import sqlite3

    try:
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True,
                              timeout=BUSY_TIMEOUT_MS / 1000)
    except sqlite3.Error:
        return False
    try:
        row = con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?",
                          (Run.__tablename__,)).fetchone()
    except sqlite3.Error:  # not a database at all
        return False
    finally:
        con.close()
    return row is not None


def open_store(url_or_path: str | os.PathLike[str] = DEFAULT_DB, *, create: bool = True) -> Store:
    """Open the store at a SQLAlchemy URL or a SQLite file path; ``create`` makes the tables of a
    new database and upgrades an older schema (a newer one is refused, exit 2)."""
    url = store_url(url_or_path)
    is_sqlite = url.startswith("sqlite")
    kwargs: dict[str, Any] = {}
    if is_sqlite:
        kwargs["connect_args"] = {"timeout": BUSY_TIMEOUT_MS / 1000}
    try:
        engine = create_engine(url, **kwargs)
    except ModuleNotFoundError as exc:  # the URL's database driver is not installed
        hint = " (pip install 'labrun[postgres]')" if url.startswith("postgres") else ""
        raise InputError(f"database driver {exc.name!r} is not installed{hint}",
                         file=os.fspath(url_or_path), field="--db") from None
    if is_sqlite:
        event.listen(engine, "connect", _sqlite_pragmas)
    if create:
        try:
            _prepare_schema(engine, os.fspath(url_or_path))
        except InputError:
            engine.dispose()
            raise
        except SQLAlchemyError as exc:
            engine.dispose()
            raise InputError(f"cannot open the database ({type(exc).__name__}: "
                             f"{str(exc.orig if hasattr(exc, 'orig') else exc).splitlines()[0]})",
                             file=os.fspath(url_or_path), field="--db") from None
    return Store(engine)
