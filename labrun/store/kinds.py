"""Run statuses, event kinds and the UTC clock of the run store, without SQLAlchemy.

``labrun status`` reads the store without the ORM (``labrun.store.statusview``); these names are
what both it and the models (``labrun.store.models`` re-exports them) share.
"""

from __future__ import annotations

import enum
from datetime import UTC, datetime


class RunStatus(enum.StrEnum):
    """A run's status, stored as its value (the strings labrun 0.1.0 wrote: old stores read the
    same). A member equals its string, so ``status == "completed"`` keeps working."""

    CREATED = "created"  # recorded, nothing emitted yet
    RUNNING = "running"  # in the loop (or the process died: see the heartbeat)
    COMPLETED = "completed"  # every point done
    STOPPED = "stopped"  # a plan stop condition ended it
    INTERRUPTED = "interrupted"  # Ctrl-C or SIGTERM
    ABORTED = "aborted"  # a safety condition or faults beyond retries
    FAILED = "failed"  # an unexpected error


class EventKind(enum.StrEnum):
    """What a run event records, stored as its value. The event that ends a run has the run's
    final status as its kind (the last five members)."""

    SAFETY_ACK = "safety_ack"  # the operator's laser-safety acknowledgement
    FAULT = "fault"  # an instrument fault (or a surprise found in an instrument's state)
    RETRY = "retry"  # a point, or the opening of the bench, tried again
    DARK = "dark"  # sources switched off after a fault
    RELIGHT = "relight"  # switching on again after a fault
    FOUND_ON = "found_on"  # a source output was on before labrun switched it on
    SAFE_OFF = "safe_off"  # the end-of-run safe-off and whether it was confirmed
    SIGNAL = "signal"  # a signal that came while the run was finishing
    REPLAY = "replay"  # this run replays a stored one (virtual, no light)
    RESUME = "resume"  # the run was resumed
    FORCED = "forced"  # resumed on different instruments with --force
    TRAFFIC_LOG = "traffic_log"  # the file the instrument traffic streamed to
    TRANSCRIPT = "transcript"  # the same, under its earlier name (runs stored before the rename)
    GUARDIAN = "guardian"  # the watcher darkened the bench after the run process died (SIGKILL)
    COMPLETED = "completed"
    STOPPED = "stopped"
    INTERRUPTED = "interrupted"
    ABORTED = "aborted"
    FAILED = "failed"


RUN_STATUSES = tuple(RunStatus)
FINISHED_STATUSES = (RunStatus.COMPLETED, RunStatus.STOPPED)


def utcnow() -> datetime:
    """The current time, timezone-aware UTC (what every column stores)."""
    return datetime.now(UTC)
