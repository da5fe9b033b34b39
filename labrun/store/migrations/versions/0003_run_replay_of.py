"""A run's link to the run it replays (``runs.replay_of``, NULL for every run measured in a lab).

Revision ID: 0003
Revises: 0002
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Apply this revision."""
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('replay_of', sa.Integer(), nullable=True))
        batch_op.create_index(batch_op.f('ix_runs_replay_of'), ['replay_of'], unique=False)
        batch_op.create_foreign_key('fk_runs_replay_of_runs', 'runs', ['replay_of'], ['id'])


def downgrade() -> None:
    """Undo this revision."""
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_constraint('fk_runs_replay_of_runs', type_='foreignkey')
        batch_op.drop_index(batch_op.f('ix_runs_replay_of'))
        batch_op.drop_column('replay_of')
