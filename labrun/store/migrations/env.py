"""Alembic environment: migrate the connection labrun hands over (never a URL from an ini file).

``labrun.store.schema.upgrade`` puts an open SQLAlchemy connection into
``config.attributes["connection"]``; batch mode lets ALTER work on SQLite too.
"""

from __future__ import annotations

from alembic import context

from labrun.store.models import Base

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=Base.metadata,
                  render_as_batch=True, compare_type=True)
with context.begin_transaction():
    context.run_migrations()
