"""labrun.writer: point commits on a writer thread stay one at a time, in order, and a failed
commit is never lost (raised in the run loop at the next submit, or at close)."""

from __future__ import annotations

import threading
import time

import pytest

from labrun.writer import PointWriter


def test_jobs_run_in_order_one_at_a_time():
    done: list[int] = []
    running = threading.Lock()

    def job(n: int) -> None:
        assert running.acquire(blocking=False), "two commits at once"
        try:
            time.sleep(0.002)
            done.append(n)
        finally:
            running.release()

    writer = PointWriter()
    for n in range(20):
        writer.submit(lambda n=n: job(n))
    writer.close()
    assert done == list(range(20))


def test_a_failed_commit_is_raised_at_the_next_submit_and_not_run_past():
    writer = PointWriter()
    ran: list[str] = []

    def fail() -> None:
        raise OSError("disk full")

    writer.submit(fail)
    with pytest.raises(OSError, match="disk full"):
        writer.submit(lambda: ran.append("next"))
    assert ran == []  # the next point was not stored behind the failure's back
    writer.close()


def test_close_waits_for_the_point_in_flight_and_raises_its_error():
    writer = PointWriter()
    stored: list[str] = []
    writer.submit(lambda: (time.sleep(0.05), stored.append("p1")))
    writer.close()
    assert stored == ["p1"]
    failing = PointWriter()
    failing.submit(lambda: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        failing.close()
    quiet = PointWriter()
    quiet.submit(lambda: 1 / 0)
    quiet.close(raise_errors=False)  # another exception is already on its way out
