"""Run statuses and event kinds are enums in code and their plain string values in the database:
a store written by labrun 0.1.0 reads back the same, and what labrun writes now is the text
0.1.0 wrote (read here with Python's sqlite3 and SQLAlchemy's text(), not through the models)."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

from sqlalchemy import text

from labrun.store import EventKind, RunStatus, open_store

FIXTURE = Path(__file__).parent / "data" / "store-0.1.0.db"  # tests/data/README.md


def _raw(path: Path, sql: str) -> list[tuple]:
    con = sqlite3.connect(path)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_a_0_1_0_store_reads_back_as_members_equal_to_the_stored_text(tmp_path):
    path = tmp_path / "old.db"
    shutil.copy(FIXTURE, path)
    statuses = _raw(path, "SELECT id, status FROM runs ORDER BY id")
    kinds = [k for (k,) in _raw(path, "SELECT kind FROM events ORDER BY id")]
    assert statuses and kinds  # the fixture has one run and three events
    store = open_store(path)
    try:
        for run_id, stored in statuses:
            status = store.get_run(run_id).status
            assert type(status) is RunStatus and status == stored and status.value == stored
        read = [e.kind for e in store.events(statuses[0][0])]
        assert read == kinds
        assert all(type(k) is EventKind for k in read)
    finally:
        store.close()
    # the upgrade and the reads left the text as it was
    assert _raw(path, "SELECT id, status FROM runs ORDER BY id") == statuses
    assert [k for (k,) in _raw(path, "SELECT kind FROM events ORDER BY id")] == kinds


def _run(store) -> int:
    return store.create_run(plan_text="[plan]\nname='t'\n", plan_sha256="0" * 64,
                            bench_text="[bench]", software_version="test", points_total=1)


def test_members_are_stored_as_their_values_on_both_backends(db_url):
    store = open_store(db_url)
    try:
        run_id = _run(store)
        assert store.get_run(run_id).status is RunStatus.CREATED  # the column default
        store.set_status(run_id, RunStatus.ABORTED, "test", finished=True)
        store.add_event(run_id, EventKind.DARK, "sources off")
        store.add_event(run_id, "relight", "a plain string is stored the same")
        with store.engine.connect() as conn:
            status = conn.execute(text("SELECT status FROM runs WHERE id = :i"),
                                  {"i": run_id}).scalar_one()
            kinds = conn.execute(text("SELECT kind FROM events WHERE run_id = :i ORDER BY id"),
                                 {"i": run_id}).scalars().all()
            # a kind this labrun does not know (a newer labrun's) is kept as text on reading
            conn.execute(text("UPDATE events SET kind = 'calibrated' WHERE kind = 'relight'"))
            conn.commit()
        assert status == "aborted" and type(status) is str
        assert kinds == ["dark", "relight"]
        read = [e.kind for e in store.events(run_id)]
        assert read == [EventKind.DARK, "calibrated"]
        assert type(read[0]) is EventKind and type(read[1]) is str
        assert store.get_run(run_id).status is RunStatus.ABORTED
    finally:
        store.close()


def test_the_enums_keep_the_0_1_0_strings():
    # the status strings labrun 0.1.0 wrote (labrun/store/models.py at 0.1.0, RUN_STATUSES)
    assert [s.value for s in RunStatus] == ["created", "running", "completed", "stopped",
                                            "interrupted", "aborted", "failed"]
    # a run's final event has its status as kind: every final status is an event kind
    finals = set(RunStatus) - {RunStatus.CREATED, RunStatus.RUNNING}
    assert {str(s) for s in finals} <= {k.value for k in EventKind}
