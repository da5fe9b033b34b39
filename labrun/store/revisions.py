"""Schema revision ids of the run store and the refusal of a store at another revision, without
SQLAlchemy: ``labrun status`` checks a SQLite store's revision with the standard library alone.

``labrun.store.schema`` re-exports these names and does the SQLAlchemy/Alembic work.
"""

from __future__ import annotations

from pathlib import Path

from labrun.errors import InputError

BASELINE = "0001"  # labrun 0.1.0's schema (no alembic_version table)
HEAD = "0003"  # the newest revision in migrations/versions (test_schema checks it)
MIGRATIONS = Path(__file__).resolve().parent / "migrations"


def known_revisions() -> list[str]:
    """Revision ids shipped with this labrun, oldest first (from the file names, no Alembic)."""
    return sorted(p.name.split("_", 1)[0] for p in (MIGRATIONS / "versions").glob("[0-9]*_*.py"))


def require_known(revision: str, where: str) -> None:
    """A schema revision this labrun does not ship is from a newer labrun: refuse it (exit 2)."""
    if revision not in known_revisions():
        raise InputError(f"the database schema is revision {revision}, newer than this labrun "
                         f"knows (up to {HEAD}): open it with a newer labrun",
                         file=where, field="--db")


def older_refusal(revision: str, where: str) -> InputError:
    """The error for a read-only command on a store at an older revision (exit 2)."""
    return InputError(f"the database schema is revision {revision}, older than this labrun's "
                      f"{HEAD}: run 'labrun db upgrade --db {where}' first",
                      file=where, field="--db")


def require_head(revision: str, where: str) -> None:
    """Refuse a store that is not at HEAD, for commands that do not upgrade (exit 2)."""
    if revision != HEAD:
        require_known(revision, where)
        raise older_refusal(revision, where)
