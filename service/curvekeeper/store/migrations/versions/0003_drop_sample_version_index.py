"""Samples lose the (channel, version) index: replay pages through a channel's samples by
seq (which grows with version), and each index costs every insert.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02 01:35:00
"""

from __future__ import annotations

from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("sample", schema=None) as batch_op:
        batch_op.drop_index("ix_sample_version")


def downgrade() -> None:
    with op.batch_alter_table("sample", schema=None) as batch_op:
        batch_op.create_index("ix_sample_version", ["channel_pk", "version"], unique=False)
