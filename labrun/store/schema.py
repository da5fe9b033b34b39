"""Schema revisions of the run store: which revision a database is at, and Alembic upgrades.

Every schema change after labrun 0.1.0 is an Alembic revision in ``labrun/store/migrations``;
``HEAD`` names the newest (a test keeps it equal to Alembic's own head). A database made by
0.1.0 has labrun's tables but no ``alembic_version`` table: it is at ``BASELINE``. Finding the
revision needs only SQLAlchemy; Alembic is imported only to upgrade, so read-only commands start
fast. On PostgreSQL, creating and upgrading hold an advisory lock, so two rigs starting at once
against one lab database do not both create or migrate it.
"""

from __future__ import annotations

from sqlalchemy import Column, Connection, Engine, MetaData, String, Table, inspect, select, text

from labrun.store.revisions import BASELINE as BASELINE  # re-exported
from labrun.store.revisions import HEAD as HEAD  # re-exported
from labrun.store.revisions import MIGRATIONS as MIGRATIONS  # re-exported
from labrun.store.revisions import known_revisions as known_revisions  # re-exported

PG_LOCK_KEY = 0x6C616272756E  # advisory lock id used while creating or upgrading ("labrun")

# The table Alembic keeps its revision in (Alembic's own name and layout).
_VERSION = Table("alembic_version", MetaData(),
                 Column("version_num", String(32), primary_key=True, nullable=False))


class SchemaState:
    """Names for what ``revision_of`` finds besides a revision id."""

    EMPTY = "empty"  # no labrun tables at all: a new database


def revision_of(conn: Connection) -> str:
    """The revision a database is at: an id, ``BASELINE`` for a 0.1.0 store, or ``EMPTY``."""
    insp = inspect(conn)
    if insp.has_table(_VERSION.name):
        found = conn.execute(select(_VERSION.c.version_num)).scalars().all()
        if len(found) == 1:
            return str(found[0])
    if insp.has_table("runs"):
        return BASELINE
    return SchemaState.EMPTY


def lock(conn: Connection) -> None:
    """Serialise schema work between processes (PostgreSQL advisory lock, held to commit)."""
    if conn.dialect.name == "postgresql":
        conn.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": PG_LOCK_KEY})


def stamp(conn: Connection, revision: str) -> None:
    """Record ``revision`` as the database's revision (creating Alembic's table if needed)."""
    _VERSION.create(conn, checkfirst=True)
    conn.execute(_VERSION.delete())
    conn.execute(_VERSION.insert().values(version_num=revision))


def alembic_config(conn: Connection):  # -> alembic.config.Config (imported lazily)
    """An Alembic Config running labrun's migrations on ``conn`` (no ini file)."""
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.attributes["connection"] = conn
    return cfg


def upgrade(engine: Engine, target: str = "head") -> tuple[str, str]:
    """Upgrade the database to ``target``; returns (revision before, revision after).

    A 0.1.0 store is stamped ``BASELINE`` first. On SQLite, foreign keys are switched off while
    migrating (batch mode copies tables; a cascading delete must not touch a row) and on again.
    """
    from alembic import command

    sqlite = engine.dialect.name == "sqlite"
    with engine.connect() as conn:
        if sqlite:
            conn.exec_driver_sql("PRAGMA foreign_keys=OFF")
            conn.commit()
        try:
            with conn.begin():
                lock(conn)
                before = revision_of(conn)
                if before == SchemaState.EMPTY:
                    raise ValueError("no labrun tables to upgrade")
                if before == BASELINE and not inspect(conn).has_table(_VERSION.name):
                    stamp(conn, BASELINE)
                command.upgrade(alembic_config(conn), target)
                after = revision_of(conn)
        finally:
            if sqlite:
                conn.rollback()
                conn.exec_driver_sql("PRAGMA foreign_keys=ON")
                conn.commit()
    return before, after
