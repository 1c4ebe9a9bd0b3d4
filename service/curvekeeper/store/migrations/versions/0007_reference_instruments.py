"""Reference instruments: a table of them, the reference a sample names, and the channel
settings that go with them. Channels (and snapshots) stored before get
``require_reference`` false, and a stated ``reference`` gets ``instrument`` null
(typed in, not taken from an instrument) and ``distribution`` normal (U with k).

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02 18:00:00
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import sqlalchemy as sa
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None

PAGE = 500
channel = sa.table("channel", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
snapshot = sa.table("snapshot", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
REFERENCE_NEW = {"instrument": None, "distribution": "normal"}


def _filled(config: dict[str, Any]) -> dict[str, Any]:
    out = {"require_reference": False, **config}
    if isinstance(config.get("reference"), dict):
        out["reference"] = {**REFERENCE_NEW, **config["reference"]}
    return out


def _without(config: dict[str, Any]) -> dict[str, Any]:
    out = {k: v for k, v in config.items() if k != "require_reference"}
    if isinstance(config.get("reference"), dict):
        out["reference"] = {k: v for k, v in config["reference"].items() if k not in REFERENCE_NEW}
    return out


def _rewrite(table: sa.TableClause, change: Callable[[dict[str, Any]], dict[str, Any]]) -> None:
    conn = op.get_bind()
    after = -1
    while rows := conn.execute(sa.select(table.c.pk, table.c.config).where(table.c.pk > after)
                               .order_by(table.c.pk).limit(PAGE)).all():
        for pk, config in rows:
            conn.execute(table.update().where(table.c.pk == pk).values(config=change(config)))
        after = rows[-1][0]


def upgrade() -> None:
    op.create_table(
        "reference_instrument",
        sa.Column("pk", sa.Integer(), nullable=False),
        sa.Column("id", sa.String(length=128), nullable=False),
        sa.Column("description", sa.Text(), nullable=False),
        sa.Column("unit", sa.String(length=256), nullable=False),
        sa.Column("expanded_uncertainty", sa.Float(), nullable=False),
        sa.Column("coverage_factor", sa.Float(), nullable=False),
        sa.Column("distribution", sa.String(length=16), nullable=False),
        sa.Column("certificate", sa.String(length=256), nullable=False),
        sa.Column("calibrated_on", sa.Date(), nullable=False),
        sa.Column("due_on", sa.Date(), nullable=False),
        sa.Column("note", sa.Text(), nullable=False),
        sa.Column("retired", sa.Boolean(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("pk", name=op.f("pk_reference_instrument")),
        sa.UniqueConstraint("id", name=op.f("uq_reference_instrument_id")),
    )
    with op.batch_alter_table("reference_instrument", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_reference_instrument_due_on"), ["due_on"], unique=False)
    with op.batch_alter_table("sample", schema=None) as batch_op:
        batch_op.add_column(sa.Column("reference", sa.String(length=128), nullable=True))
    _rewrite(channel, _filled)
    _rewrite(snapshot, _filled)


def downgrade() -> None:
    _rewrite(channel, _without)
    _rewrite(snapshot, _without)
    with op.batch_alter_table("sample", schema=None) as batch_op:
        batch_op.drop_column("reference")
    with op.batch_alter_table("reference_instrument", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_reference_instrument_due_on"))
    op.drop_table("reference_instrument")
