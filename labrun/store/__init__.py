"""The run store: SQLAlchemy models and ``open_store`` (SQLite by default, any SQLAlchemy URL)."""

from labrun.store.db import (
    DEFAULT_DB,
    Store,
    TraceData,
    open_existing_store,
    open_store,
    store_url,
)
from labrun.store.models import (
    FINISHED_STATUSES,
    RUN_STATUSES,
    Base,
    Event,
    Line,
    Point,
    Run,
    Spool,
    Trace,
)

__all__ = [
    "DEFAULT_DB", "FINISHED_STATUSES", "RUN_STATUSES", "Base", "Event", "Line", "Point", "Run",
    "Spool", "Store", "Trace", "TraceData", "open_existing_store", "open_store", "store_url",
]
