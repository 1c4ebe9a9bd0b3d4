"""Schema migrations (Alembic): ``upgrade`` to the newest revision, and where a store stands.

Alembic is imported only where a migration runs or its scripts are read: a service starting
on a store already at ``HEAD`` checks the stored revision with one query and goes on."""

from __future__ import annotations

from typing import TYPE_CHECKING

from sqlalchemy import Engine, inspect, text

from ..errors import ServiceError
from .tables import Base

if TYPE_CHECKING:
    from alembic.config import Config

#: the newest migration's revision (tests/store/test_migrations.py holds it to Alembic's head)
HEAD = "0012"


class SchemaError(ServiceError):
    """The store's schema is not the one this version needs."""

    status = 503
    code = "schema_outdated"


def alembic_config(engine: Engine) -> Config:
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", "curvekeeper.store:migrations")
    cfg.set_main_option("sqlalchemy.url", engine.url.render_as_string(hide_password=False))
    return cfg


def head_revision(engine: Engine) -> str | None:
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config(engine)).get_current_head()


def current_revision(engine: Engine) -> str | None:
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def stored_revision(engine: Engine) -> str | None:
    """The revision the store records (one query, without Alembic); None without a history."""
    if "alembic_version" not in inspect(engine).get_table_names():
        return None
    with engine.connect() as conn:
        return conn.execute(text("SELECT version_num FROM alembic_version")).scalar()


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Bring the schema up to ``revision`` in one transaction."""
    from alembic import command

    cfg = alembic_config(engine)
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)


def prepare(engine: Engine) -> None:
    """Create the schema of an empty store by migrations; refuse a store whose schema is
    behind (it needs ``curvekeeper db upgrade``, after a backup) or unknown."""
    if stored_revision(engine) == HEAD:
        return
    head = head_revision(engine)
    current = current_revision(engine)
    if current == head:
        return
    if current is None:
        ours = set(Base.metadata.tables) & set(inspect(engine).get_table_names())
        if ours and current_revision(engine) == head:
            return  # another process migrated it between our two looks
        if ours:
            raise SchemaError(f"the store has tables ({', '.join(sorted(ours))}) but no migration history; "
                              "it was not made by curvekeeper's migrations")
        try:
            upgrade(engine)
        except Exception:
            # another process may have created it at the same moment
            if current_revision(engine) != head:
                raise
        return
    raise SchemaError(f"the store's schema is at revision {current}, this version needs {head}: "
                      "back it up, then run `curvekeeper db upgrade`")
