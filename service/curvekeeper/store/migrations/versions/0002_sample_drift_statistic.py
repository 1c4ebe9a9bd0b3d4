"""Each sample keeps the drift statistic after it, for the statistic's history.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01 23:58:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("sample", schema=None) as batch_op:
        batch_op.add_column(sa.Column("drift_statistic", sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("sample", schema=None) as batch_op:
        batch_op.drop_column("drift_statistic")
