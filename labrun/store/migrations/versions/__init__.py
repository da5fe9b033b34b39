"""Alembic revisions of the run store, one file per schema change, oldest first."""
