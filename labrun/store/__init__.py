"""The run store: SQLAlchemy models and ``open_store`` (SQLite by default, any SQLAlchemy URL).

The names below load SQLAlchemy on first use (PEP 562), so commands that only need
``DEFAULT_DB`` for their ``--help`` start without it.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # what the lazy names below are, for the type checker (nothing imported)
    from labrun.store.db import Store, TraceData, open_existing_store, open_store, store_url
    from labrun.store.kinds import FINISHED_STATUSES, RUN_STATUSES, EventKind, RunStatus
    from labrun.store.models import Base, Event, Line, Point, Run, Spool, Trace

DEFAULT_DB = "labrun.db"  # SQLite file in the current folder when --db is not given

_LAZY = {
    "Store": "db", "TraceData": "tracedata", "open_existing_store": "db", "open_store": "db",
    "store_url": "db",
    "FINISHED_STATUSES": "kinds", "RUN_STATUSES": "kinds", "RunStatus": "kinds",
    "EventKind": "kinds", "Base": "models", "Event": "models",
    "Line": "models", "Point": "models", "Run": "models", "Spool": "models", "Trace": "models",
}

__all__ = [  # the names of _LAZY, written out so linters and type checkers see them
    "DEFAULT_DB", "Store", "TraceData", "open_existing_store", "open_store", "store_url",
    "FINISHED_STATUSES", "RUN_STATUSES", "RunStatus", "EventKind", "Base", "Event", "Line",
    "Point", "Run", "Spool", "Trace",
]
assert set(__all__) == {"DEFAULT_DB", *_LAZY}


def __getattr__(name: str) -> Any:
    """Import the module that defines ``name`` when it is first asked for."""
    if name in _LAZY:
        return getattr(importlib.import_module(f"labrun.store.{_LAZY[name]}"), name)
    raise AttributeError(f"module 'labrun.store' has no attribute {name!r}")
