"""Open a SQLite run store on a thread while the run opens its bench, so SQLAlchemy's import
(about a third of a run's start-up) is off the way to the first instrument exchange: the thread
starts when the engine starts opening the bench (``labrun.preload.bench_opening``) or at the
store's first use, whichever comes first.

``open_deferred`` first checks the store the way ``open_store`` would refuse it, with the
standard library only (a missing folder, a folder given as the file, a place it may not write,
a file that is not SQLite, a schema from a newer labrun: one line, exit 2, before any
instrument is touched), then starts the thread. The
``DeferredStore`` it returns knows its URL at once (the guardian watcher needs it before the
bench opens); any other use waits for the thread and goes to the real ``Store``, and an error
the thread met is raised there. The engine's first store use is the run row, written once the
bench is open and before any source is switched on. A server URL (PostgreSQL) is opened at once,
as before: its checks need the server.
"""

from __future__ import annotations

import os
import sqlite3
import threading
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labrun.errors import InputError
from labrun.preload import forget, when_bench_opens
from labrun.store.revisions import require_known
from labrun.store.statusview import BUSY_TIMEOUT_S, is_sqlite, sqlite_location

if TYPE_CHECKING:
    from labrun.store.db import Store


class DeferredStore:
    """A Store being opened on a thread: ``url`` at once, anything else once it is open."""

    def __init__(self, url: str, where: str, *,
                 opener: Callable[[str], Store] | None = None):
        self.url = url
        self._where = where
        self._opener = opener or _open_store
        self._store: Store | None = None
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._open, name="labrun-store-open",
                                        daemon=True)
        self._started = False
        self._lock = threading.Lock()
        when_bench_opens(self.start)  # opened while the instruments answer

    def start(self) -> None:
        """Start opening (once): when the bench starts opening, or at the first use."""
        forget(self.start)
        with self._lock:
            if not self._started:
                self._started = True
                self._thread.start()

    def _open(self) -> None:
        """The thread: import SQLAlchemy and open (create or upgrade) the store."""
        try:
            self._store = self._opener(self._where)
        except BaseException as exc:  # noqa: BLE001 - raised where the store is first used
            self._error = exc

    def result(self) -> Store:
        """The open Store (waits for the thread; re-raises what it met)."""
        self.start()
        self._thread.join()
        if self._error is not None:
            raise self._error
        assert self._store is not None  # the thread either opened it or kept its error
        return self._store

    def __getattr__(self, name: str) -> Any:
        """Any attribute of the open Store (untyped: the engine reaches it through
        ``RunStore``'s typed methods)."""
        return getattr(self.result(), name)

    def close(self) -> None:
        """Close the store once it is open (an open that failed leaves nothing to close)."""
        forget(self.start)
        with self._lock:
            if not self._started:  # never needed: nothing to open or close
                self._started = True
                return
        self._thread.join()
        if self._store is not None:
            self._store.close()


def _open_store(where: str) -> Store:
    """``labrun.store.db.open_store`` (SQLAlchemy imported on first use)."""
    from labrun.store.db import open_store

    return open_store(where)


def precheck_sqlite(url_or_path: str | os.PathLike[str]) -> str:
    """The URL ``open_store`` would give a SQLite path or URL; InputError (exit 2) for what it
    would refuse: a missing folder (path or URL), a folder or device given as the file, a place
    labrun may not write, a file that is not SQLite, a schema newer than this labrun's. Writes
    nothing; a file that does not exist yet is fine (the run creates it)."""
    where = os.fspath(url_or_path)
    url, path = sqlite_location(url_or_path)
    if path is None:
        return url
    _require_writable(path, where)
    if not path.is_file() or path.stat().st_size == 0:
        return url
    try:
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True,
                              timeout=BUSY_TIMEOUT_S)
        try:
            tables = {n for (n,) in con.execute(
                "SELECT name FROM sqlite_master WHERE type = 'table'")}
            found = ([v for (v,) in con.execute("SELECT version_num FROM alembic_version")]
                     if "alembic_version" in tables else [])
        finally:
            con.close()
    except sqlite3.Error as exc:
        raise InputError(f"cannot open the database ({type(exc).__name__}: "
                         f"{str(exc).splitlines()[0] if str(exc) else exc})",
                         file=where, field="--db") from None
    if len(found) == 1:
        require_known(str(found[0]), where)
    return url


def _require_writable(path: Path, where: str) -> None:
    """InputError unless ``path`` is a regular file labrun may write, or one it may create in an
    existing folder it may write (SQLite writes its journal beside the file). Leaves nothing
    behind: a file that does not exist yet is created and removed again."""
    def refuse(what: str) -> InputError:
        return InputError(what, file=where, field="--db")

    if path.exists() and not path.is_file():
        raise refuse(f"{path} is not a database file (a folder or a device)")
    if not path.parent.is_dir():
        raise refuse(f"folder {path.parent} does not exist")
    try:
        if path.exists():
            os.close(os.open(path, os.O_RDWR))
        else:
            os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644))
            os.unlink(path)
    except OSError as exc:
        raise refuse(f"cannot write the database at {path} ({exc.strerror})") from None
    if not os.access(path.parent, os.W_OK):
        raise refuse(f"cannot write in folder {path.parent} (SQLite writes its journal there)")


def open_deferred(url_or_path: str | os.PathLike[str], *,
                  opener: Callable[[str], Any] | None = None) -> Any:
    """A store for ``labrun run``: SQLite checked now and opened on a thread (DeferredStore),
    anything else opened now. ``opener``: what opens it (default ``open_store``)."""
    if not is_sqlite(url_or_path):
        return (opener or _open_store)(os.fspath(url_or_path))
    return DeferredStore(precheck_sqlite(url_or_path), os.fspath(url_or_path), opener=opener)
