"""The silence watch and counts by state: each channel state gains ``service_state`` (from
its model state), ``silent_since`` (the latest sample's receipt, else the channel's
creation), ``stale_after`` and ``stale_since`` (null: no channel is watched until it sets
``expected_interval``); channels and snapshots get ``expected_interval`` null.

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-02 19:00:00
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import sqlalchemy as sa
from alembic import op

import curvekeeper.store.tables

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None

PAGE = 500
Time = curvekeeper.store.tables.UTCDateTime
channel = sa.table("channel", sa.column("pk", sa.Integer), sa.column("config", sa.JSON),
                   sa.column("created_at", Time()))
snapshot = sa.table("snapshot", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
state = sa.table("channel_state", sa.column("channel_pk", sa.Integer), sa.column("model_state", sa.JSON),
                 sa.column("n_samples", sa.BigInteger), sa.column("service_state", sa.String),
                 sa.column("silent_since", Time()))
sample = sa.table("sample", sa.column("channel_pk", sa.Integer), sa.column("seq", sa.BigInteger),
                  sa.column("received_at", Time()))


def _rewrite(table: sa.TableClause, change: Callable[[dict[str, Any]], dict[str, Any]]) -> None:
    conn = op.get_bind()
    after = -1
    while rows := conn.execute(sa.select(table.c.pk, table.c.config).where(table.c.pk > after)
                               .order_by(table.c.pk).limit(PAGE)).all():
        for pk, config in rows:
            conn.execute(table.update().where(table.c.pk == pk).values(config=change(config)))
        after = rows[-1][0]


def _states() -> None:
    """Each state's service state from its model state, and since when it has been silent:
    its latest sample's receipt (one lookup on the (channel, seq) index), else its creation."""
    conn = op.get_bind()
    after = -1
    while rows := conn.execute(sa.select(state.c.channel_pk, state.c.model_state, state.c.n_samples,
                                         channel.c.created_at)
                               .join(channel, channel.c.pk == state.c.channel_pk).where(state.c.channel_pk > after)
                               .order_by(state.c.channel_pk).limit(PAGE)).all():
        for pk, model_state, n, created in rows:
            received = conn.scalar(sa.select(sample.c.received_at).where(sample.c.channel_pk == pk,
                                                                         sample.c.seq == n)) if n else None
            service = model_state.get("service", "in_service") if isinstance(model_state, dict) else "in_service"
            conn.execute(state.update().where(state.c.channel_pk == pk).values(
                service_state=service, silent_since=received or created))
        after = rows[-1][0]


def upgrade() -> None:
    with op.batch_alter_table("channel_state", schema=None) as batch_op:
        batch_op.add_column(sa.Column("service_state", sa.String(length=16), nullable=False,
                                      server_default="in_service"))
        batch_op.add_column(sa.Column("silent_since", Time(timezone=True), nullable=True))
        batch_op.add_column(sa.Column("stale_after", Time(timezone=True), nullable=True))
        batch_op.add_column(sa.Column("stale_since", Time(timezone=True), nullable=True))
        batch_op.create_index(batch_op.f("ix_channel_state_stale_after"), ["stale_after"], unique=False)
    _rewrite(channel, lambda c: {"expected_interval": None, **c})
    _rewrite(snapshot, lambda c: {"expected_interval": None, **c})
    _states()


def downgrade() -> None:
    _rewrite(channel, lambda c: {k: v for k, v in c.items() if k != "expected_interval"})
    _rewrite(snapshot, lambda c: {k: v for k, v in c.items() if k != "expected_interval"})
    with op.batch_alter_table("channel_state", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_channel_state_stale_after"))
        batch_op.drop_column("stale_since")
        batch_op.drop_column("stale_after")
        batch_op.drop_column("silent_since")
        batch_op.drop_column("service_state")
