"""Alembic migrations of the run store (script folder; run through ``labrun.store.schema``)."""
