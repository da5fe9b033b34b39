"""One watcher thread for every deadline (labrun/deadlines.py): each fires once, after its own
time and only if still armed, whatever else is armed beside it (not timed beyond loose bounds)."""

from __future__ import annotations

import threading
import time

from labrun.deadlines import MONITOR, Alarm


def test_overlapping_alarms_fire_in_their_own_order_and_only_when_armed():
    fired: list[str] = []
    done = threading.Event()

    def note(name: str):
        def call() -> None:
            fired.append(name)
            if len(fired) == 2:
                done.set()
        return call

    late = Alarm(0.30, note("late"))
    early = Alarm(0.10, note("early"))
    quiet = Alarm(0.05, note("quiet"))
    with late, early:
        with quiet:
            pass  # disarmed before its time
        assert done.wait(5.0)
        assert time.monotonic() - late.started >= 0.30
    assert fired == ["early", "late"] and early.fired.is_set() and late.fired.is_set()
    assert not quiet.fired.is_set()
    time.sleep(0.1)
    assert fired == ["early", "late"]  # each once


def test_many_alarms_share_one_thread():
    before = {t.ident for t in threading.enumerate()}
    for _ in range(200):
        with Alarm(60.0, lambda: None):
            pass
    started = {t.name for t in threading.enumerate() if t.ident not in before}
    assert started <= {"labrun-deadlines"}, started
    assert MONITOR.armed() == 0


def test_the_watched_thread_fires_an_overdue_watchdog_itself():
    """A monitor thread starved of CPU must not let an overrun pass: the run loop's own check
    fires the watchdog (on_overrun in the loop's thread) once its bound has passed, once."""
    from labrun.faults import PointWatchdog

    calls: list[str] = []
    dog = PointWatchdog(0.05, lambda: calls.append(threading.current_thread().name))
    assert not dog.overdue()  # not armed, not due: nothing happens
    time.sleep(0.06)
    assert dog.overdue() and dog.fired.is_set()
    assert calls == [threading.current_thread().name]
    assert dog.overdue() and len(calls) == 1
