"""Calibration records, decision rules and due dates.

A new table ``calibration_record``; each channel state gains ``last_calibrated_at``,
``due_on`` and ``due_soon_on``; channels and snapshots get ``decision_rule`` simple,
``recalibration_interval_days`` 365 and ``due_soon_days`` 30. A channel calibrated before
records existed has no record, but its due date counts from its latest ``calibration``
event.

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-02 18:30:00
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta
from typing import Any

import sqlalchemy as sa
from alembic import op

import curvekeeper.store.tables

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None

PAGE = 500
INTERVAL, WINDOW = 365, 30
NEW_TOP: dict[str, Any] = {"decision_rule": "simple", "recalibration_interval_days": INTERVAL,
                           "due_soon_days": WINDOW}
channel = sa.table("channel", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
snapshot = sa.table("snapshot", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
Time = curvekeeper.store.tables.UTCDateTime
event = sa.table("event", sa.column("channel_pk", sa.Integer), sa.column("kind", sa.String),
                 sa.column("at", Time()))
state = sa.table("channel_state", sa.column("channel_pk", sa.Integer), sa.column("last_calibrated_at", Time()),
                 sa.column("due_on", sa.Date), sa.column("due_soon_on", sa.Date))


def _pages(conn: sa.Connection, stmt: Callable[[int], Any]) -> Iterator[list[Any]]:
    after = -1
    while rows := conn.execute(stmt(after)).all():
        yield list(rows)
        after = rows[-1][0]


def _rewrite(table: sa.TableClause, change: Callable[[dict[str, Any]], dict[str, Any]]) -> None:
    conn = op.get_bind()
    for rows in _pages(conn, lambda after: sa.select(table.c.pk, table.c.config).where(table.c.pk > after)
                       .order_by(table.c.pk).limit(PAGE)):
        for pk, config in rows:
            conn.execute(table.update().where(table.c.pk == pk).values(config=change(config)))


def _due_dates() -> None:
    """Due dates of channels calibrated before records: latest calibration event + 365 days."""
    conn = op.get_bind()
    latest = conn.execute(sa.select(event.c.channel_pk, sa.func.max(event.c.at)).where(event.c.kind == "calibration")
                          .group_by(event.c.channel_pk)).all()
    for pk, at in latest:
        if isinstance(at, str):  # SQLite's text through an aggregate, which drops the column type
            at = datetime.fromisoformat(at)
        at = at.replace(tzinfo=UTC) if at.tzinfo is None else at.astimezone(UTC)
        due = at.date() + timedelta(days=INTERVAL)
        conn.execute(state.update().where(state.c.channel_pk == pk).values(
            last_calibrated_at=at, due_on=due, due_soon_on=due - timedelta(days=WINDOW)))


def upgrade() -> None:
    op.create_table(
        "calibration_record",
        sa.Column("pk", sa.Integer(), nullable=False),
        sa.Column("channel_pk", sa.Integer(), nullable=False),
        sa.Column("version", sa.BigInteger(), nullable=False),
        sa.Column("at", Time(timezone=True), nullable=False),
        sa.Column("created_at", Time(timezone=True), nullable=False),
        sa.Column("key_id", sa.String(length=40), nullable=True),
        sa.Column("verdict", sa.String(length=16), nullable=False),
        sa.Column("supersedes", sa.Integer(), nullable=True),
        sa.Column("record", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(["channel_pk"], ["channel.pk"], name=op.f("fk_calibration_record_channel_pk_channel"),
                                ondelete="CASCADE"),
        sa.ForeignKeyConstraint(["supersedes"], ["calibration_record.pk"],
                                name=op.f("fk_calibration_record_supersedes_calibration_record")),
        sa.PrimaryKeyConstraint("pk", name=op.f("pk_calibration_record")),
        sa.UniqueConstraint("supersedes", name=op.f("uq_calibration_record_supersedes")),
    )
    with op.batch_alter_table("calibration_record", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_calibration_record_channel_pk"), ["channel_pk"], unique=False)
    with op.batch_alter_table("channel_state", schema=None) as batch_op:
        batch_op.add_column(sa.Column("last_calibrated_at", Time(timezone=True), nullable=True))
        batch_op.add_column(sa.Column("due_on", sa.Date(), nullable=True))
        batch_op.add_column(sa.Column("due_soon_on", sa.Date(), nullable=True))
    _rewrite(channel, lambda c: {**NEW_TOP, **c})
    _rewrite(snapshot, lambda c: {**NEW_TOP, **c})
    _due_dates()


def downgrade() -> None:
    _rewrite(channel, lambda c: {k: v for k, v in c.items() if k not in NEW_TOP})
    _rewrite(snapshot, lambda c: {k: v for k, v in c.items() if k not in NEW_TOP})
    with op.batch_alter_table("channel_state", schema=None) as batch_op:
        batch_op.drop_column("due_soon_on")
        batch_op.drop_column("due_on")
        batch_op.drop_column("last_calibrated_at")
    with op.batch_alter_table("calibration_record", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_calibration_record_channel_pk"))
    op.drop_table("calibration_record")
