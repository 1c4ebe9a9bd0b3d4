"""The due watch's mark (``channel_state.due_noticed``) and the event feed's cursor
(``event_feed``).

Revision ID: 0012
Revises: 0011
Create Date: 2026-12-03 08:20:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import curvekeeper.store.tables

revision = "0012"
down_revision = "0011"
branch_labels = None
depends_on = None

Time = curvekeeper.store.tables.UTCDateTime


def upgrade() -> None:
    with op.batch_alter_table("channel_state") as batch:
        batch.add_column(sa.Column("due_noticed", sa.String(length=16), nullable=True))
    op.create_table(
        "event_feed",
        sa.Column("name", sa.String(length=32), nullable=False),
        sa.Column("last_event_pk", sa.BigInteger(), nullable=False),
        sa.Column("lease_owner", sa.String(length=64), nullable=True),
        sa.Column("lease_until", Time(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_event_feed")),
    )


def downgrade() -> None:
    op.drop_table("event_feed")
    with op.batch_alter_table("channel_state") as batch:
        batch.drop_column("due_noticed")
