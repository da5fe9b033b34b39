"""Stored fits (fits, fit_parameters), a spool's fibre type and edit time, per-trace encoding.

Existing traces are float32 bytes: their encoding column is filled with "f32".

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Apply this revision."""
    op.create_table('fits',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('spool_id', sa.Integer(), nullable=True),
    sa.Column('run_ids', sa.JSON(), nullable=False),
    sa.Column('method', sa.String(length=200), nullable=False),
    sa.Column('software_version', sa.String(length=50), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('spool_snapshot', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['spool_id'], ['spools.id'], ),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('fits', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_fits_spool_id'), ['spool_id'], unique=False)

    op.create_table('fit_parameters',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('fit_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=60), nullable=False),
    sa.Column('value', sa.Float(), nullable=True),
    sa.Column('stderr', sa.Float(), nullable=True),
    sa.Column('u95', sa.Float(), nullable=True),
    sa.Column('unit', sa.String(length=40), nullable=False),
    sa.Column('model', sa.Text(), nullable=False),
    sa.Column('n_points', sa.Integer(), nullable=False),
    sa.Column('residual_rms', sa.Float(), nullable=True),
    sa.Column('extra', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['fit_id'], ['fits.id'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('fit_id', 'name', name='uq_fit_parameters_fit_name')
    )
    with op.batch_alter_table('fit_parameters', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_fit_parameters_fit_id'), ['fit_id'], unique=False)

    with op.batch_alter_table('spools', schema=None) as batch_op:
        batch_op.add_column(sa.Column('fibre_type', sa.String(length=100), nullable=True))
        batch_op.add_column(sa.Column('updated_at', sa.DateTime(timezone=True),
                                      nullable=True))

    with op.batch_alter_table('traces', schema=None) as batch_op:
        batch_op.add_column(sa.Column('encoding', sa.String(length=16), server_default='f32',
                                      nullable=False))



def downgrade() -> None:
    """Undo this revision."""
    with op.batch_alter_table('traces', schema=None) as batch_op:
        batch_op.drop_column('encoding')

    with op.batch_alter_table('spools', schema=None) as batch_op:
        batch_op.drop_column('updated_at')
        batch_op.drop_column('fibre_type')

    with op.batch_alter_table('fit_parameters', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_fit_parameters_fit_id'))

    op.drop_table('fit_parameters')
    with op.batch_alter_table('fits', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_fits_spool_id'))

    op.drop_table('fits')
