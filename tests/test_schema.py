"""Schema revisions: a 0.1.0 store upgrades keeping every row, read-only commands ask for
``labrun db upgrade``, a newer schema is refused, and the migrations build exactly the models'
schema on SQLite and PostgreSQL (compared with Alembic's own autogenerate comparison)."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import MetaData, create_engine, select, text

from labrun.cli import main
from labrun.errors import InputError
from labrun.store import Base, Trace, open_existing_store, open_store, schema
from labrun.store.db import store_url

FIXTURE = Path(__file__).parent / "data" / "store-0.1.0.db"
TABLES = ("spools", "runs", "points", "traces", "lines", "events")


def _rows(path: Path) -> dict[str, list[tuple]]:
    """Every row of the 0.1.0 tables, read with Python's sqlite3 (not through labrun)."""
    con = sqlite3.connect(path)
    try:
        out = {}
        for table in TABLES:
            cols = [r[1] for r in con.execute(f"PRAGMA table_info({table})")]
            keep = [c for c in cols if c not in ("encoding", "fibre_type", "updated_at",
                                                 "replay_of")]  # added by later revisions
            quoted = ", ".join(f'"{c}"' for c in keep)
            out[table] = con.execute(f"SELECT {quoted} FROM {table} ORDER BY id").fetchall()
        return out
    finally:
        con.close()


@pytest.fixture
def old_db(tmp_path: Path) -> Path:
    path = tmp_path / "old.db"
    shutil.copy(FIXTURE, path)
    return path


def _revision(url: str) -> str:
    engine = create_engine(store_url(url))
    try:
        with engine.connect() as conn:
            return schema.revision_of(conn)
    finally:
        engine.dispose()


def test_head_is_alembic_head():
    """schema.HEAD (read without Alembic at start-up) is the head of the revision scripts."""
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(schema.MIGRATIONS))
    script = ScriptDirectory.from_config(cfg)
    assert script.get_heads() == [schema.HEAD]
    assert schema.known_revisions()[-1] == schema.HEAD
    assert script.get_base() == schema.BASELINE


def test_fixture_is_a_baseline_store(old_db):
    assert _revision(str(old_db)) == schema.BASELINE
    counts = {t: len(r) for t, r in _rows(old_db).items()}
    assert counts == {"spools": 1, "runs": 1, "points": 25, "traces": 25, "lines": 200,
                      "events": 3}


def test_upgrade_keeps_every_row(old_db):
    before = _rows(old_db)
    store = open_store(old_db)  # a writing command upgrades
    try:
        assert store.upgraded_from is None  # open_store upgrades silently; db upgrade reports
        assert _revision(str(old_db)) == schema.HEAD
        assert _rows(old_db) == before
        assert sqlite3.connect(old_db).execute(  # revision 0003: no stored run is a replay
            "SELECT count(*) FROM runs WHERE replay_of IS NULL").fetchone()[0] == 1
        with store.session() as s:
            traces = s.scalars(select(Trace).order_by(Trace.id)).all()
            assert {t.encoding for t in traces} == {"f32"}
            # the old rows decode as IEEE 754 binary32, as sqlite3 + numpy read them
            raw = sqlite3.connect(old_db).execute(
                "SELECT y_data FROM traces ORDER BY id").fetchall()
            for t, (blob,) in zip(traces, raw, strict=True):
                np.testing.assert_array_equal(t.y(), np.frombuffer(blob, "<f4"))
        # a new point on the upgraded store is written compactly beside the old ones
        run_id = store.latest_run_id()
        from labrun.store import TraceData

        store.add_point(run_id, key="new", index=99, setpoint={},
                        traces=[TraceData(np.linspace(1549, 1551, 11), np.full(11, -60.0))],
                        lines=[])
        with store.session() as s:
            assert s.scalars(select(Trace.encoding).order_by(Trace.id.desc())).first() == "mdb-dz1"
    finally:
        store.close()


def test_read_only_commands_ask_for_db_upgrade(old_db, capsys):
    with pytest.raises(InputError, match="labrun db upgrade --db"):
        open_existing_store(old_db)
    assert main(["status", "--db", str(old_db)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "labrun db upgrade --db" in err[0] and str(old_db) in err[0]
    assert _revision(str(old_db)) == schema.BASELINE  # nothing changed


def test_db_upgrade_command(old_db, capsys):
    before = _rows(old_db)
    assert main(["db", "upgrade", "--db", str(old_db)]) == 0
    out = capsys.readouterr().out
    assert f"from revision {schema.BASELINE} to {schema.HEAD}" in out
    assert _rows(old_db) == before
    assert main(["status", "--db", str(old_db)]) == 0
    assert main(["db", "upgrade", "--db", str(old_db)]) == 0
    assert "already at revision" in capsys.readouterr().out


def test_newer_schema_refused(db_url, capsys):
    open_store(db_url).close()
    engine = create_engine(store_url(db_url))
    with engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '9999'"))
    engine.dispose()
    for opener in (open_store, open_existing_store):
        with pytest.raises(InputError, match="newer than this labrun"):
            opener(db_url)
    assert main(["status", "--db", db_url]) == 2
    assert "newer than this labrun" in capsys.readouterr().err


def _schema_diff(url: str) -> list:
    engine = create_engine(store_url(url))
    try:
        with engine.connect() as conn:
            ctx = MigrationContext.configure(conn, opts={"compare_type": True})
            return compare_metadata(ctx, Base.metadata)
    finally:
        engine.dispose()


def test_migrations_build_the_models_schema(db_url):
    """From empty: every revision in turn gives the tables the models declare (and a new store
    made with create_all is stamped HEAD)."""
    engine = create_engine(store_url(db_url))
    try:
        with engine.begin() as conn:
            from alembic import command

            command.upgrade(schema.alembic_config(conn), "head")
    finally:
        engine.dispose()
    assert _revision(db_url) == schema.HEAD
    assert _schema_diff(db_url) == []


def test_upgrade_from_baseline_keeps_rows_on_each_backend(db_url, tmp_path):
    """The 0.1.0 fixture's rows copied into a baseline-revision schema (SQLite or PostgreSQL),
    then upgraded by opening: every row is still there and the schema equals the models'."""
    engine = create_engine(store_url(db_url))
    src = MetaData()
    fixture = create_engine(f"sqlite:///{FIXTURE}")
    src.reflect(fixture)
    try:
        with engine.begin() as conn:
            from alembic import command

            command.upgrade(schema.alembic_config(conn), schema.BASELINE)
            conn.execute(text("DROP TABLE alembic_version"))  # 0.1.0 had none
            with fixture.connect() as fconn:
                for table in TABLES:
                    rows = [dict(r._mapping) for r in fconn.execute(select(src.tables[table]))]
                    conn.execute(src.tables[table].insert(), rows)
            if conn.dialect.name == "postgresql":  # keep serial counters past the copied ids
                for table in TABLES:
                    conn.execute(text(f"SELECT setval(pg_get_serial_sequence('{table}', 'id'), "
                                      f"(SELECT max(id) FROM {table}))"))
    finally:
        fixture.dispose()
    assert _revision(db_url) == schema.BASELINE
    counts = {}
    with engine.connect() as conn:
        for table in TABLES:
            counts[table] = conn.execute(text(f"SELECT count(*) FROM {table}")).scalar()
    engine.dispose()
    store = open_store(db_url)
    try:
        with store.engine.connect() as conn:
            for table in TABLES:
                assert conn.execute(text(f"SELECT count(*) FROM {table}")).scalar() \
                    == counts[table]
        from labrun.queries import run_points

        table = run_points(store, 1)
        assert len(table) == 25 and table["sideband_high_1"].notna().all()
    finally:
        store.close()
    assert _revision(db_url) == schema.HEAD
    assert _schema_diff(db_url) == []
