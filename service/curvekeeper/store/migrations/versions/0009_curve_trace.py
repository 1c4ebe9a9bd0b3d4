"""The curve trace: per channel, the largest difference of its curve from the reference
curve over measurement time, for the forecast of when it leaves tolerance. Channels that
exist already start with an empty trace (points come with their next samples).

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-02 18:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import curvekeeper.store.tables

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "curve_trace",
        sa.Column("pk", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("channel_pk", sa.Integer(), nullable=False),
        sa.Column("t", curvekeeper.store.tables.UTCDateTime(timezone=True), nullable=False),
        sa.Column("difference", sa.Float(), nullable=False),
        sa.Column("u", sa.Float(), nullable=True),
        sa.Column("version", sa.BigInteger(), nullable=False),
        sa.ForeignKeyConstraint(["channel_pk"], ["channel.pk"], name=op.f("fk_curve_trace_channel_pk_channel"),
                                ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("pk", name=op.f("pk_curve_trace")),
    )
    with op.batch_alter_table("curve_trace", schema=None) as batch_op:
        batch_op.create_index("ix_curve_trace_channel_t", ["channel_pk", "t"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("curve_trace", schema=None) as batch_op:
        batch_op.drop_index("ix_curve_trace_channel_t")
    op.drop_table("curve_trace")
