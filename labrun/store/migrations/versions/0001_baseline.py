"""Baseline: the schema of labrun 0.1.0, as it was before Alembic (frozen: never edit).

A database made by labrun 0.1.0 has these tables and no alembic_version table; labrun stamps
it with this revision and upgrades it from here.

Revision ID: 0001
Revises: (none)
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    """Apply this revision."""
    op.create_table('spools',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('label', sa.String(length=200), nullable=False),
    sa.Column('length_km', sa.Float(), nullable=True),
    sa.Column('loss_db_per_km', sa.Float(), nullable=True),
    sa.Column('note', sa.Text(), nullable=True),
    sa.Column('params', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('label')
    )
    op.create_table('runs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('status', sa.String(length=20), nullable=False),
    sa.Column('reason', sa.Text(), nullable=True),
    sa.Column('plan_name', sa.String(length=200), nullable=True),
    sa.Column('plan_path', sa.Text(), nullable=True),
    sa.Column('plan_text', sa.Text(), nullable=False),
    sa.Column('plan_sha256', sa.String(length=64), nullable=False),
    sa.Column('bench_name', sa.String(length=200), nullable=True),
    sa.Column('bench_path', sa.Text(), nullable=True),
    sa.Column('bench_text', sa.Text(), nullable=False),
    sa.Column('operator', sa.String(length=200), nullable=True),
    sa.Column('unattended', sa.Boolean(), nullable=False),
    sa.Column('software_version', sa.String(length=50), nullable=False),
    sa.Column('identities', sa.JSON(), nullable=False),
    sa.Column('settings', sa.JSON(), nullable=False),
    sa.Column('points_total', sa.Integer(), nullable=False),
    sa.Column('host', sa.String(length=200), nullable=True),
    sa.Column('pid', sa.Integer(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('started_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('finished_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('heartbeat_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('spool_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['spool_id'], ['spools.id'], ),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_runs_status'), ['status'], unique=False)

    op.create_table('events',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('kind', sa.String(length=40), nullable=False),
    sa.Column('role', sa.String(length=40), nullable=True),
    sa.Column('point_key', sa.String(length=400), nullable=True),
    sa.Column('message', sa.Text(), nullable=False),
    sa.Column('data', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('events', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_events_kind'), ['kind'], unique=False)
        batch_op.create_index(batch_op.f('ix_events_run_id'), ['run_id'], unique=False)

    op.create_table('points',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('key', sa.String(length=400), nullable=False),
    sa.Column('index', sa.Integer(), nullable=False),
    sa.Column('repeat', sa.Integer(), nullable=False),
    sa.Column('is_reference', sa.Boolean(), nullable=False),
    sa.Column('setpoint', sa.JSON(), nullable=False),
    sa.Column('applied', sa.JSON(), nullable=False),
    sa.Column('spacing_ghz', sa.Float(), nullable=True),
    sa.Column('floor_dbm', sa.Float(), nullable=True),
    sa.Column('flags', sa.JSON(), nullable=False),
    sa.Column('attempts', sa.Integer(), nullable=False),
    sa.Column('started_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('finished_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('run_id', 'key', name='uq_points_run_key')
    )
    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_points_run_id'), ['run_id'], unique=False)

    op.create_table('traces',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('point_id', sa.Integer(), nullable=False),
    sa.Column('kind', sa.String(length=20), nullable=False),
    sa.Column('x_unit', sa.String(length=8), nullable=False),
    sa.Column('n', sa.Integer(), nullable=False),
    sa.Column('x_start', sa.Float(), nullable=False),
    sa.Column('x_stop', sa.Float(), nullable=False),
    sa.Column('x_data', sa.LargeBinary(), nullable=True),
    sa.Column('y_data', sa.LargeBinary(), nullable=False),
    sa.Column('rbw_nm', sa.Float(), nullable=True),
    sa.Column('settings', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['point_id'], ['points.id'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('traces', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_traces_point_id'), ['point_id'], unique=False)

    op.create_table('lines',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('point_id', sa.Integer(), nullable=False),
    sa.Column('trace_id', sa.Integer(), nullable=True),
    sa.Column('kind', sa.String(length=10), nullable=False),
    sa.Column('side', sa.String(length=5), nullable=False),
    sa.Column('order', sa.Integer(), nullable=False),
    sa.Column('freq_thz', sa.Float(), nullable=True),
    sa.Column('wavelength_nm', sa.Float(), nullable=True),
    sa.Column('power_dbm', sa.Float(), nullable=True),
    sa.Column('floor_dbm', sa.Float(), nullable=True),
    sa.Column('snr_db', sa.Float(), nullable=True),
    sa.Column('detected', sa.Boolean(), nullable=False),
    sa.Column('upper_limit_dbm', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['point_id'], ['points.id'], ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['trace_id'], ['traces.id'], ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id')
    )
    with op.batch_alter_table('lines', schema=None) as batch_op:
        batch_op.create_index('ix_lines_point_kind', ['point_id', 'kind', 'side', 'order'],
                              unique=False)



def downgrade() -> None:
    """Undo this revision."""
    with op.batch_alter_table('lines', schema=None) as batch_op:
        batch_op.drop_index('ix_lines_point_kind')

    op.drop_table('lines')
    with op.batch_alter_table('traces', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_traces_point_id'))

    op.drop_table('traces')
    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_points_run_id'))

    op.drop_table('points')
    with op.batch_alter_table('events', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_events_run_id'))
        batch_op.drop_index(batch_op.f('ix_events_kind'))

    op.drop_table('events')
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_runs_status'))

    op.drop_table('runs')
    op.drop_table('spools')
