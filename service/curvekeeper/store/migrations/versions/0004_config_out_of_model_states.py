"""The channel configuration is kept once, in ``channel.config``: model states (format 2)
no longer carry it. A snapshot keeps the configuration it was taken under in its own
column, since a rollback restores it.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-03 10:00:00
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

PAGE = 500
channel = sa.table("channel", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
channel_state = sa.table("channel_state", sa.column("channel_pk", sa.Integer), sa.column("model_state", sa.JSON))
snapshot = sa.table("snapshot", sa.column("pk", sa.Integer), sa.column("channel_pk", sa.Integer),
                    sa.column("config", sa.JSON), sa.column("model_state", sa.JSON))


def _pages(conn: sa.Connection, stmt: Callable[[int], Any]) -> Iterator[list[Any]]:
    """Rows a page at a time, by increasing key (the first column), so a large store fits in memory."""
    after = -1
    while rows := conn.execute(stmt(after)).all():
        yield list(rows)
        after = rows[-1][0]


def _without_config(state: dict[str, Any]) -> dict[str, Any]:
    return {**{k: v for k, v in state.items() if k != "config"}, "format": 2}


def upgrade() -> None:
    with op.batch_alter_table("snapshot", schema=None) as batch_op:
        batch_op.add_column(sa.Column("config", sa.JSON(), nullable=True))
    conn = op.get_bind()
    for rows in _pages(conn, lambda after: sa.select(snapshot.c.pk, snapshot.c.model_state)
                       .where(snapshot.c.pk > after).order_by(snapshot.c.pk).limit(PAGE)):
        for pk, state in rows:
            conn.execute(snapshot.update().where(snapshot.c.pk == pk)
                         .values(config=state["config"], model_state=_without_config(state)))
    for rows in _pages(conn, lambda after: sa.select(channel_state.c.channel_pk, channel_state.c.model_state)
                       .where(channel_state.c.channel_pk > after).order_by(channel_state.c.channel_pk).limit(PAGE)):
        for pk, state in rows:
            conn.execute(channel_state.update().where(channel_state.c.channel_pk == pk)
                         .values(model_state=_without_config(state)))
    with op.batch_alter_table("snapshot", schema=None) as batch_op:
        batch_op.alter_column("config", existing_type=sa.JSON(), nullable=False)


def downgrade() -> None:
    conn = op.get_bind()
    for rows in _pages(conn, lambda after: sa.select(snapshot.c.pk, snapshot.c.config, snapshot.c.model_state)
                       .where(snapshot.c.pk > after).order_by(snapshot.c.pk).limit(PAGE)):
        for pk, config, state in rows:
            conn.execute(snapshot.update().where(snapshot.c.pk == pk)
                         .values(model_state={**state, "format": 1, "config": config}))
    for rows in _pages(conn, lambda after: sa.select(channel.c.pk, channel.c.config, channel_state.c.model_state)
                       .join(channel_state, channel_state.c.channel_pk == channel.c.pk)
                       .where(channel.c.pk > after).order_by(channel.c.pk).limit(PAGE)):
        for pk, config, state in rows:
            conn.execute(channel_state.update().where(channel_state.c.channel_pk == pk)
                         .values(model_state={**state, "format": 1, "config": config}))
    with op.batch_alter_table("snapshot", schema=None) as batch_op:
        batch_op.drop_column("config")
