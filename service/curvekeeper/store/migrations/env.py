"""Alembic environment: runs on a connection the caller passes in (see curvekeeper.store.migrate)."""

from __future__ import annotations

from alembic import context
from sqlalchemy.engine import Connection

from curvekeeper.store.tables import Base

config = context.config
target_metadata = Base.metadata


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is None:
        from sqlalchemy import create_engine

        engine = create_engine(config.get_main_option("sqlalchemy.url") or "")
        with engine.begin() as conn:
            _run(conn)
        engine.dispose()
    else:
        _run(connection)


def _run(connection: Connection) -> None:
    context.configure(connection=connection, target_metadata=target_metadata,
                      render_as_batch=True, compare_type=True)
    with context.begin_transaction():
        context.run_migrations()


if context.is_offline_mode():
    raise SystemExit("curvekeeper migrations run online only: use `curvekeeper db upgrade`")
run_migrations_online()
