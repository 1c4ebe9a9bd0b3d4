"""A channel can be archived (``channel.archived_at``: when; null while it is live), and a
key records when it was last used (``api_key.last_used_at``; null: not since the column
came). Both start empty: every channel stays live, no key has a recorded use.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02 18:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from curvekeeper.store.tables import UTCDateTime

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.add_column("channel", sa.Column("archived_at", UTCDateTime(timezone=True), nullable=True))
    op.add_column("api_key", sa.Column("last_used_at", UTCDateTime(timezone=True), nullable=True))


def downgrade() -> None:
    # plain ALTER TABLE ... DROP COLUMN (SQLite 3.35 and later), never a batch copy of the
    # table: recreating ``channel`` would cascade-delete every channel's rows
    op.drop_column("api_key", "last_used_at")
    op.drop_column("channel", "archived_at")
