"""Webhooks and their delivery outbox (``webhook``, ``webhook_delivery``).

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-02 19:40:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

import curvekeeper.store.tables

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None

Time = curvekeeper.store.tables.UTCDateTime


def upgrade() -> None:
    op.create_table(
        "webhook",
        sa.Column("pk", sa.Integer(), nullable=False),
        sa.Column("id", sa.String(length=40), nullable=False),
        sa.Column("url", sa.Text(), nullable=False),
        sa.Column("events", sa.JSON(), nullable=False),
        sa.Column("secret", sa.String(length=256), nullable=False),
        sa.Column("created_at", Time(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("pk", name=op.f("pk_webhook")),
        sa.UniqueConstraint("id", name=op.f("uq_webhook_id")),
    )
    op.create_table(
        "webhook_delivery",
        sa.Column("pk", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("webhook_pk", sa.Integer(), nullable=False),
        sa.Column("event_pk", sa.BigInteger(), nullable=True),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("next_attempt_at", Time(timezone=True), nullable=False),
        sa.Column("last_status", sa.Integer(), nullable=True),
        sa.Column("last_error", sa.Text(), nullable=True),
        sa.Column("created_at", Time(timezone=True), nullable=False),
        sa.Column("delivered_at", Time(timezone=True), nullable=True),
        sa.ForeignKeyConstraint(["event_pk"], ["event.pk"], name=op.f("fk_webhook_delivery_event_pk_event"),
                                ondelete="CASCADE"),
        sa.ForeignKeyConstraint(["webhook_pk"], ["webhook.pk"], name=op.f("fk_webhook_delivery_webhook_pk_webhook"),
                                ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("pk", name=op.f("pk_webhook_delivery")),
    )
    op.create_index("ix_webhook_delivery_due", "webhook_delivery", ["state", "next_attempt_at"], unique=False)
    op.create_index(op.f("ix_webhook_delivery_webhook_pk"), "webhook_delivery", ["webhook_pk"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_webhook_delivery_webhook_pk"), table_name="webhook_delivery")
    op.drop_index("ix_webhook_delivery_due", table_name="webhook_delivery")
    op.drop_table("webhook_delivery")
    op.drop_table("webhook")
