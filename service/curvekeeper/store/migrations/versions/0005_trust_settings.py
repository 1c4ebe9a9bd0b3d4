"""Channels declared before the trust settings get them, with the behaviour they had:
``coverage`` 0.95 beside their stored fixed ``coverage_factor``, no ``reference``,
``range_margin`` 1, no input ``resolution``, and for an rls learner (which keeps its
``initial_covariance``) ``covariance_bound`` 10. Model states of format 2 are read as
they are (the core fills their new fields when it loads them).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02 15:00:00
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

PAGE = 500
channel = sa.table("channel", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
snapshot = sa.table("snapshot", sa.column("pk", sa.Integer), sa.column("config", sa.JSON))
NEW_TOP = {"coverage": 0.95, "reference": None, "range_margin": 1.0}


def _pages(conn: sa.Connection, stmt: Callable[[int], Any]) -> Iterator[list[Any]]:
    after = -1
    while rows := conn.execute(stmt(after)).all():
        yield list(rows)
        after = rows[-1][0]


def _filled(config: dict[str, Any]) -> dict[str, Any]:
    out = {**NEW_TOP, **config}
    out["inputs"] = [{"resolution": None, **i} for i in config["inputs"]]
    if config["learner"]["kind"] == "rls":
        out["learner"] = {"covariance_bound": 10.0, **config["learner"]}
    return out


def _without(config: dict[str, Any]) -> dict[str, Any]:
    out = {k: v for k, v in config.items() if k not in NEW_TOP}
    out["inputs"] = [{k: v for k, v in i.items() if k != "resolution"} for i in config["inputs"]]
    if config["learner"]["kind"] == "rls":
        out["learner"] = {k: v for k, v in config["learner"].items() if k != "covariance_bound"}
    return out


def _rewrite(table: sa.TableClause, change: Callable[[dict[str, Any]], dict[str, Any]]) -> None:
    conn = op.get_bind()
    for rows in _pages(conn, lambda after: sa.select(table.c.pk, table.c.config).where(table.c.pk > after)
                       .order_by(table.c.pk).limit(PAGE)):
        for pk, config in rows:
            conn.execute(table.update().where(table.c.pk == pk).values(config=change(config)))


def upgrade() -> None:
    _rewrite(channel, _filled)
    _rewrite(snapshot, _filled)


def downgrade() -> None:
    _rewrite(channel, _without)
    _rewrite(snapshot, _without)
