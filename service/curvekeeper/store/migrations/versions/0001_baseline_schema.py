"""Baseline schema: channels, their state, samples, snapshots, events, API keys.

Revision ID: 0001
Revises: 
Create Date: 2026-12-01 22:31:15.253373
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import curvekeeper.store.tables


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('api_key',
    sa.Column('id', sa.String(length=40), nullable=False),
    sa.Column('secret_hash', sa.String(length=64), nullable=False),
    sa.Column('role', sa.String(length=16), nullable=False),
    sa.Column('prefixes', sa.JSON(), nullable=False),
    sa.Column('label', sa.Text(), nullable=True),
    sa.Column('created_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.Column('revoked_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_api_key')),
    sa.UniqueConstraint('secret_hash', name=op.f('uq_api_key_secret_hash'))
    )
    op.create_table('channel',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('id', sa.String(length=128), nullable=False),
    sa.Column('config', sa.JSON(), nullable=False),
    sa.Column('created_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('pk', name=op.f('pk_channel')),
    sa.UniqueConstraint('id', name=op.f('uq_channel_id'))
    )
    op.create_table('channel_state',
    sa.Column('channel_pk', sa.Integer(), nullable=False),
    sa.Column('model_state', sa.JSON(), nullable=False),
    sa.Column('version', sa.BigInteger(), nullable=False),
    sa.Column('n_samples', sa.BigInteger(), nullable=False),
    sa.Column('n_rejected', sa.BigInteger(), nullable=False),
    sa.Column('drift_state', sa.String(length=16), nullable=False),
    sa.Column('tolerance_state', sa.String(length=24), nullable=True),
    sa.Column('rmse', sa.Float(), nullable=True),
    sa.Column('last_sample_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=True),
    sa.Column('updated_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['channel_pk'], ['channel.pk'], name=op.f('fk_channel_state_channel_pk_channel'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('channel_pk', name=op.f('pk_channel_state'))
    )
    op.create_table('event',
    sa.Column('pk', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('channel_pk', sa.Integer(), nullable=True),
    sa.Column('kind', sa.String(length=32), nullable=False),
    sa.Column('version', sa.BigInteger(), nullable=True),
    sa.Column('key_id', sa.String(length=40), nullable=True),
    sa.Column('at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.Column('details', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['channel_pk'], ['channel.pk'], name=op.f('fk_event_channel_pk_channel'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk', name=op.f('pk_event'))
    )
    with op.batch_alter_table('event', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_event_channel_pk'), ['channel_pk'], unique=False)

    op.create_table('sample',
    sa.Column('pk', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), nullable=False),
    sa.Column('channel_pk', sa.Integer(), nullable=False),
    sa.Column('seq', sa.BigInteger(), nullable=False),
    sa.Column('version', sa.BigInteger(), nullable=False),
    sa.Column('source', sa.String(length=128), nullable=True),
    sa.Column('source_seq', sa.BigInteger(), nullable=True),
    sa.Column('t', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.Column('received_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.Column('x', sa.JSON(), nullable=False),
    sa.Column('y', sa.Float(), nullable=False),
    sa.Column('residual', sa.Float(), nullable=True),
    sa.Column('accepted', sa.Boolean(), nullable=False),
    sa.Column('reason', sa.String(length=16), nullable=True),
    sa.ForeignKeyConstraint(['channel_pk'], ['channel.pk'], name=op.f('fk_sample_channel_pk_channel'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk', name=op.f('pk_sample')),
    sa.UniqueConstraint('channel_pk', 'seq', name='uq_sample_channel_seq')
    )
    with op.batch_alter_table('sample', schema=None) as batch_op:
        batch_op.create_index('ix_sample_source', ['channel_pk', 'source', 'source_seq'], unique=True)
        batch_op.create_index('ix_sample_version', ['channel_pk', 'version'], unique=False)

    op.create_table('snapshot',
    sa.Column('pk', sa.Integer(), nullable=False),
    sa.Column('channel_pk', sa.Integer(), nullable=False),
    sa.Column('reason', sa.String(length=32), nullable=False),
    sa.Column('label', sa.String(length=256), nullable=True),
    sa.Column('model_state', sa.JSON(), nullable=False),
    sa.Column('version', sa.BigInteger(), nullable=False),
    sa.Column('n_samples', sa.BigInteger(), nullable=False),
    sa.Column('created_at', curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['channel_pk'], ['channel.pk'], name=op.f('fk_snapshot_channel_pk_channel'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('pk', name=op.f('pk_snapshot'))
    )
    with op.batch_alter_table('snapshot', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_snapshot_channel_pk'), ['channel_pk'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('snapshot', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_snapshot_channel_pk'))

    op.drop_table('snapshot')
    with op.batch_alter_table('sample', schema=None) as batch_op:
        batch_op.drop_index('ix_sample_version')
        batch_op.drop_index('ix_sample_source')

    op.drop_table('sample')
    with op.batch_alter_table('event', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_event_channel_pk'))

    op.drop_table('event')
    op.drop_table('channel_state')
    op.drop_table('channel')
    op.drop_table('api_key')
