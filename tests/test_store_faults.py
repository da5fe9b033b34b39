"""Store faults during a run (issue 13, item 3), on the virtual lab: a database that fills up or
stays locked by another writer darkens every source at once (timed on the lab's own state),
is retried briefly, and ends the run aborted with one line; the final status the database
refuses is kept in a record beside it, which ``labrun status`` shows and ``labrun resume``
writes in. A fault that clears lets the run go on, the light back through the full switch-on.
"""

from __future__ import annotations

import sqlite3

import pytest
from sqlalchemy import event
from sqlalchemy.exc import OperationalError

from labrun.cli import main
from labrun.faultdrill import ROWS, measure
from labrun.faults import RetryPolicy
from labrun.runstore import apply_fallback, fallback_path, read_fallback
from labrun.store import open_store

TIMEOUTS_MS = {name: 1000 for name in ("generic-osa", "generic-laser", "generic-attenuator")}
POLICY = RetryPolicy(attempts=5, backoff_s=0.05, dark_limit_s=2.0)
BUSY_MS = 1000  # SQLite's lock wait in these tests (the store's own is 15 s)


@pytest.mark.parametrize("name", ["db-full", "db-locked"])
def test_a_failing_database_ends_the_run_dark_and_recorded(tmp_path, name, capsys):
    m = measure(ROWS[name], tmp_path, timeouts_ms=TIMEOUTS_MS, policy=POLICY,
                busy_timeout_ms=BUSY_MS)
    bound = m.timeout_s + 1.0  # a locked database answers only after its busy timeout
    assert m.sources_off_s is not None and m.sources_off_s <= bound, m
    assert m.shutters_closed_s is not None and m.shutters_closed_s <= bound, m
    assert m.status == "aborted" and "database" in m.reason and "\n" not in m.reason, m
    assert m.run_end_s <= m.give_up_s, m
    # the database refused the final status: it waits beside it, and status shows it
    assert m.stored_status == "running" and m.fallback_status == "aborted", m
    db = tmp_path / "runs.db"
    assert main(["status", "--db", str(db)]) == 0
    out = capsys.readouterr()
    assert ": aborted (" in out.out and "labrun resume" in out.out and not out.err
    # once the database works again, resume's first step writes it in
    store = open_store(db)
    (run_id,) = apply_fallback(store)
    run = store.get_run(run_id)
    assert run.status == "aborted" and "database" in run.reason
    assert [e.kind for e in store.events(run_id)][-2:] == ["safe_off", "aborted"]
    assert not fallback_path(store.url).exists() and read_fallback(store.url) == {}


def test_a_passing_database_fault_goes_dark_then_the_run_goes_on(tmp_path):
    """One write fails (a lock released a moment later): sources off at once, the retry
    succeeds, the next point switches on again through prepare; nothing is lost."""
    from labrun.faultdrill import FaultRow

    def fail_once(_lab, store):
        left = {"n": 1}

        def once(_conn, _cursor, statement, *_args):
            if left["n"] and statement.lstrip().upper().startswith(("INSERT", "UPDATE")):
                left["n"] -= 1
                raise sqlite3.OperationalError("database is locked")

        event.listen(store.engine, "before_cursor_execute", once)

    m = measure(FaultRow("db-once", "one write refused", fail_once), tmp_path,
                timeouts_ms=TIMEOUTS_MS, policy=POLICY, n_points=30)
    if (m.extra["dark"], m.extra["relight"]) != (1, 1):  # a load spike on the shared machine
        (tmp_path / "again").mkdir()  # can overrun a 1 s bound once more: measure once more
        m = measure(FaultRow("db-once", "one write refused", fail_once), tmp_path / "again",
                    timeouts_ms=TIMEOUTS_MS, policy=POLICY, n_points=30)
    assert m.sources_off_s is not None and m.sources_off_s <= 1.0, m
    assert m.status == "completed" and m.points_done == 30, m
    assert m.extra["dark"] == 1 and m.extra["relight"] == 1, m


class _LockedForRuns:
    """A store whose ``create_run`` finds the database locked; every other call goes to the
    real store."""

    def __init__(self, store):
        self.store = store

    def __getattr__(self, name):
        return getattr(self.store, name)

    def create_run(self, **_fields):
        raise OperationalError("INSERT INTO runs", {}, sqlite3.OperationalError(
            "database is locked"))


def test_a_database_fault_before_anything_opens_is_one_line(tmp_path, capsys):
    """The run row cannot be created: exit 1, one line naming the database error, no
    traceback, no instrument touched."""
    from labrun.faultdrill import plan_text, scenario, write_bench
    from labrun.store import open_store
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        bench = write_bench(lab, tmp_path, {})
        plan = tmp_path / "plan.toml"
        plan.write_text(plan_text(3), encoding="utf-8")
        code = main(["run", str(plan), "--bench", str(bench), "--db", str(tmp_path / "r.db"),
                     "--unattended", "--operator", "T. Varga", "--ack-safety",
                     "--no-progress"],
                    overrides={"open_store": lambda url: _LockedForRuns(open_store(url))})
        assert lab.sources_off()
    err = capsys.readouterr().err
    assert code == 1 and "database is locked" in err and "Traceback" not in err
    assert len([ln for ln in err.splitlines() if ln.startswith("labrun: error")]) == 1


def test_a_write_still_waiting_darkens_before_it_fails():
    """A write held up longer than ``slow_s`` (a lock, a stalled server) calls the darkening
    hook while it still waits, once; a quick write never does."""
    import time

    from labrun.runstore import RunStore

    told: list[tuple[float, BaseException]] = []

    class Slow:
        def write(self, seconds):
            time.sleep(seconds)
            return seconds

    rs = RunStore(Slow(), on_fault=lambda exc: told.append((time.monotonic(), exc)),
                  slow_s=0.2)
    t0 = time.monotonic()
    assert rs.write(0.6) == 0.6  # the write itself succeeds in the end
    assert len(told) == 1 and isinstance(told[0][1], TimeoutError)
    assert 0.2 <= told[0][0] - t0 < 0.5  # told while it was still waiting
    assert rs.write(0.05) == 0.05 and len(told) == 1  # quick: nothing more
