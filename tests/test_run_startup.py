"""``labrun run`` opens a SQLite store on a thread while the bench opens (labrun/store/deferred.py):
SQLAlchemy is not imported on the way to the first instrument exchange, what ``open_store``
would refuse is still refused before any instrument is touched, and the run stores the same.
Import checks are on ``sys.modules`` in a fresh interpreter (not timed: speed figures live in
benchmarks/bench_startup.py)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from _engine_support import OPERATOR, scenario, wait_for, write_bench, write_plan
from sqlalchemy import create_engine, text

from labrun.cli import main
from labrun.errors import InputError
from labrun.preload import bench_opening
from labrun.store import open_store
from labrun.store.deferred import DeferredStore, open_deferred, precheck_sqlite
from labrun.vlab.lab import VirtualLab

POWERS = [0.0, 1.0]


@pytest.fixture()
def lab():
    with VirtualLab(scenario()) as vl:
        yield vl


def test_the_run_path_imports_no_sqlalchemy_before_the_bench_opens():
    """Everything `labrun run` imports before its first exchange (CLI, plan, bench, engine,
    rehearsal, guardian) leaves SQLAlchemy and scipy for later."""
    code = ("import sys\nimport labrun.cli, labrun.cli.run, labrun.engine, labrun.rehearse\n"
            "import labrun.bench, labrun.plan, labrun.guardian, labrun.store.deferred\n"
            "print(sorted({m.split('.')[0] for m in sys.modules} & "
            "{'sqlalchemy', 'scipy', 'pandas', 'matplotlib', 'alembic'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, timeout=120)
    assert out.stdout.splitlines()[-1] == "[]", out.stdout


def _refused(tmp_path, lab, capsys, db, match):
    """`labrun run` into ``db``: exit 2, one line naming --db, and no instrument exchange."""
    log = tmp_path / "traffic.jsonl"
    rc = main(["run", str(write_plan(tmp_path, POWERS)), "--bench",
               str(write_bench(lab, tmp_path)), "--db", str(db), "--unattended", "--operator",
               OPERATOR, "--ack-safety", "--no-progress", "--traffic-log", str(log)])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "--db" in err[0] and match in err[0], err
    assert not log.exists() or log.read_text().strip() == ""  # nothing sent to any instrument
    assert lab.sources_off()


def test_a_file_that_is_not_sqlite_is_refused_before_the_bench(tmp_path, lab, capsys):
    junk = tmp_path / "junk.db"
    junk.write_text("not a database\n")
    _refused(tmp_path, lab, capsys, junk, "file is not a database")
    assert junk.read_text() == "not a database\n"


def test_a_newer_schema_is_refused_before_the_bench(tmp_path, lab, capsys):
    db = tmp_path / "newer.db"
    open_store(db).close()
    engine = create_engine(f"sqlite:///{db}")
    with engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '9999'"))
    engine.dispose()
    _refused(tmp_path, lab, capsys, db, "newer than this labrun")


def test_a_missing_folder_is_refused_before_the_bench(tmp_path, lab, capsys):
    _refused(tmp_path, lab, capsys, tmp_path / "no" / "such" / "r.db", "does not exist")


def test_a_folder_given_as_the_database_is_refused_before_the_bench(tmp_path, lab, capsys):
    folder = tmp_path / "a_folder"
    folder.mkdir()
    _refused(tmp_path, lab, capsys, folder, "not a database file")


def test_a_sqlite_url_into_a_missing_folder_is_refused_before_the_bench(tmp_path, lab, capsys):
    _refused(tmp_path, lab, capsys, f"sqlite:///{tmp_path}/no/such/r.db", "does not exist")


def test_a_place_labrun_may_not_write_is_refused_before_the_bench(tmp_path, lab, capsys):
    # /proc refuses new files even to root (procfs, Linux proc(5)); nothing is left behind.
    _refused(tmp_path, lab, capsys, "/proc/labrun-test.db", "cannot write")
    assert not Path("/proc/labrun-test.db").exists()


def test_precheck_accepts_new_and_current_stores(tmp_path):
    new = tmp_path / "new.db"
    assert precheck_sqlite(new) == f"sqlite:///{new}" and not new.exists()
    store = open_store(new)
    try:
        assert precheck_sqlite(new) == store.url  # the URL the store itself names
    finally:
        store.close()
    assert precheck_sqlite("sqlite:///rel.db") == "sqlite:///rel.db"


def test_deferred_store_raises_what_the_thread_met(tmp_path):
    class Boom(Exception):
        pass

    def fails(_where):
        raise Boom("thread failed")

    d = DeferredStore("sqlite:///x", str(tmp_path / "x.db"))
    assert not (tmp_path / "x.db").exists()  # waits for the bench to open, or a first use
    assert d.latest_run_id() is None and (tmp_path / "x.db").exists()
    d.close()
    bad = DeferredStore("sqlite:///y", str(tmp_path / "y.db"), opener=fails)
    with pytest.raises(Boom):
        bad.latest_run_id()
    bad.close()  # nothing to close
    unused = open_deferred(str(tmp_path / "z.db"))
    unused.close()  # never needed: never opened, nothing created
    bench_opening()
    assert not (tmp_path / "z.db").exists()
    started = open_deferred(str(tmp_path / "w.db"))
    bench_opening()  # the engine starts opening the bench: the store opens meanwhile
    assert wait_for(lambda: (tmp_path / "w.db").exists(), 60) is not None  # no use needed
    assert started.url == f"sqlite:///{tmp_path / 'w.db'}"
    started.close()


def test_a_run_through_the_deferred_store_stores_every_point(tmp_path, lab, capsys):
    db = tmp_path / "r.db"
    rc = main(["run", str(write_plan(tmp_path, POWERS)), "--bench",
               str(write_bench(lab, tmp_path)), "--db", str(db), "--unattended", "--operator",
               OPERATOR, "--ack-safety", "--no-progress", "--json"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 0 and out["status"] == "completed" and out["points_done"] == len(POWERS)
    assert lab.sources_off()
    store = open_store(db)
    try:
        run = store.get_run(out["run_id"])
        assert run.spool_id is not None and run.identities  # written once the bench was open
        assert [e.kind for e in store.events(out["run_id"])][0] == "safety_ack"
    finally:
        store.close()


def test_deferred_store_is_not_used_for_a_server_url():
    """A server URL is opened at once (its checks need the server): open_store is called."""
    called = []
    opener = lambda url: called.append(url) or "store"  # noqa: E731 - the test's open_store
    assert open_deferred("postgresql+psycopg://u@127.0.0.1:1/x", opener=opener) == "store"
    assert called == ["postgresql+psycopg://u@127.0.0.1:1/x"]


def test_a_server_url_is_opened_at_once(inst_free_port):
    """A server URL is not deferred (its checks need the server): a server that is not there
    is the one-line refusal from open_deferred itself, before any bench is opened."""
    with pytest.raises(InputError, match="cannot open the database"):
        open_deferred(f"postgresql+psycopg://labrun@127.0.0.1:{inst_free_port}/none")
    with pytest.raises(InputError):
        precheck_sqlite("/no/such/folder/r.db")
