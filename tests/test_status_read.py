"""``labrun status`` reads a SQLite store with the standard library (labrun.store.statusview) and a
server store with SQLAlchemy Core: both must show exactly what the ORM's ``Store.summary`` shows
on the same database (the reference here is the ORM path, the one status used before).
"""

from __future__ import annotations

import json
import subprocess
import sys
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from labrun.cli import main
from labrun.cli.status import _text, status_report, with_fallback
from labrun.runstore import fallback_path, write_fallback
from labrun.store import TraceData, open_store
from labrun.store.statusview import read_status, sqlite_database

NOW = datetime(2031, 5, 4, 3, 2, 1, tzinfo=UTC)  # a fixed "now" for the heartbeat age


def _fill(store) -> int:
    """Two runs; the second one running, with points, an input trace, faults and odd lines."""
    first = store.create_run(plan_text="", plan_sha256="0" * 64, bench_text="",
                             software_version="test", points_total=1, status="completed")
    run_id = store.create_run(plan_text="", plan_sha256="0" * 64, bench_text="",
                              software_version="test", points_total=7, status="running",
                              plan_name="HNLF-A17 power sweep", operator="tester",
                              bench_name="bench-7", settings={"estimate_s_per_point": 2.5},
                              started_at=NOW - timedelta(minutes=3))
    x = np.linspace(1545.0, 1555.0, 11)
    for i in range(3):
        lines = [dict(kind="tone", side="low", order=0, power_dbm=-1.25 - i, trace=1),
                 dict(kind="tone", side="high", order=0, power_dbm=float("nan"), trace=1),
                 dict(kind="sideband", side="low", order=1, power_dbm=None, detected=False,
                      upper_limit_dbm=-61.5, trace=1),
                 dict(kind="sideband", side="high", order=2, power_dbm=-70.0, trace=1),
                 dict(kind="tone", side="low", order=0, power_dbm=5.0, trace=0)]  # input trace
        store.add_point(run_id, key=f"p{i}", index=i, setpoint={"power_a_dbm": -float(i)},
                        traces=[TraceData(x, np.full(11, -60.0), kind="input"),
                                TraceData(x, np.full(11, -50.0))],
                        lines=lines, started_at=NOW)
    store.add_event(run_id, "fault", "osa: timeout", role="osa", point_key="p1")
    store.add_event(run_id, "retry", "again")
    store.add_event(run_id, "fault", "laser_a: no reply", role="laser_a", point_key="p2")
    store.add_event(first, "fault", "another run's fault", role="osa")
    store.update_run(run_id, heartbeat_at=NOW - timedelta(seconds=12.25))  # add_point beat it
    return run_id


def _filled(db) -> int:
    """Fill a fresh store at ``db`` as _fill does and close it; the running run's id."""
    store = open_store(db)
    try:
        return _fill(store)
    finally:
        store.close()


def _both(db: str, run_id: int | None) -> tuple[dict, dict]:
    """(status report via the ORM's Store.summary, via read_status), with the same now."""
    store = open_store(db)
    try:
        rid = run_id if run_id is not None else store.latest_run_id()
        orm = with_fallback(status_report(store.summary(rid), now=NOW), store.url)
    finally:
        store.close()
    url, summary, _ = read_status(db, run_id)
    return orm, with_fallback(status_report(summary, now=NOW), url)


def test_fast_path_equals_the_orm_path(db_url):
    run_id = _filled(db_url)
    for rid in (run_id, None, 1):
        orm, fast = _both(db_url, rid)
        assert json.dumps(orm, sort_keys=True) == json.dumps(fast, sort_keys=True)
        assert _text(orm) == _text(fast)
    orm, fast = _both(db_url, run_id)
    # what the comparison covers: a pace, an estimate-free ETA, faults, the output lines only
    assert fast["points_done"] == 3 and fast["faults"] == 2 and fast["eta_s"] is not None
    assert fast["last_fault"]["message"] == "laser_a: no reply"
    assert [ln["power_dbm"] for ln in fast["last_point"]["lines"]] == [-3.25, None, None, -70.0]
    assert fast["last_point"]["lines"][2]["upper_limit_dbm"] == -61.5
    assert fast["heartbeat_age_s"] == pytest.approx(12.25)
    assert read_status(db_url, 99)[1] is None


def test_fast_path_shows_the_fallback_record(tmp_path):
    db = str(tmp_path / "runs.db")
    store = open_store(db)
    try:
        run_id = _fill(store)
        url = store.url
    finally:
        store.close()
    write_fallback(url, {"run_id": run_id, "status": "aborted", "reason": "database full",
                         "events": []})
    orm, fast = _both(db, run_id)
    assert orm == fast and fast["status"] == "aborted" and "database full" in fast["reason"]
    assert fast["fallback"] == str(fallback_path(url)) == str(tmp_path / "runs.db.unwritten.jsonl")


@pytest.mark.parametrize(("url", "database"), [
    ("sqlite:///runs.db", "runs.db"), ("sqlite:////abs/r.db?timeout=3", "/abs/r.db"),
    ("sqlite+pysqlite:///a%20b.db", "a b.db"), ("sqlite://", None),
    ("sqlite:///:memory:", ":memory:")])
def test_sqlite_database_as_sqlalchemy_reads_it(url, database):
    """sqlite_database matches SQLAlchemy's own URL parser (make_url) on these forms."""
    from sqlalchemy.engine import make_url

    assert sqlite_database(url) == database == make_url(url).database


def test_status_imports_no_sqlalchemy(tmp_path):
    """A SQLite store's status runs without SQLAlchemy (checked on sys.modules, not timed)."""
    db = tmp_path / "runs.db"
    _filled(db)
    code = ("import sys\nfrom labrun.cli import main\n"
            f"rc = main(['status', '--db', {str(db)!r}])\n"
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'sqlalchemy', 'numpy'}), rc)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, timeout=120)
    assert out.stdout.splitlines()[-1] == "[] 0", out.stdout
    assert "points   3/7" in out.stdout


def test_status_never_writes_the_store(tmp_path, capsys):
    db = tmp_path / "runs.db"
    _filled(db)
    before = db.read_bytes()
    assert main(["status", "--db", str(db), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["points_done"] == 3
    assert db.read_bytes() == before


def test_status_says_the_process_died_when_the_guardian_darkened_the_bench(db_url):
    """A run killed outright stays 'running' in the store; the guardian watcher's event
    (labrun/guardian.py) is what status shows then, with no ETA and no stale-heartbeat advice;
    a resume that beats again after it clears the warning. Same on both read paths."""
    store = open_store(db_url)
    try:
        run_id = _fill(store)  # heartbeat 12.25 s before NOW, well inside the stale limit
        orm, fast = _both(db_url, run_id)
        assert fast["process_died"] is None and fast["eta_s"] is not None
        store.update_run(run_id, heartbeat_at=datetime.now(UTC) - timedelta(seconds=5))
        store.add_event(run_id, "guardian", "the run process (pid 4242) ended without its own "
                        "safe-off; the guardian darkened the bench in 0.04 s: every source off")
        orm, fast = _both(db_url, run_id)
        assert json.dumps(orm, sort_keys=True) == json.dumps(fast, sort_keys=True)
        assert _text(orm) == _text(fast)
        assert fast["process_died"]["message"].startswith("the run process (pid 4242)")
        assert fast["eta_s"] is None and not fast["stale"]
        text = _text(fast)
        assert "the run process died" in text and f"labrun resume {run_id}" in text
        assert "ETA" not in text
        store.update_run(run_id, heartbeat_at=datetime.now(UTC) + timedelta(seconds=1))
        _, resumed = _both(db_url, run_id)
        assert resumed["process_died"] is None and "died" not in _text(resumed)
    finally:
        store.close()

