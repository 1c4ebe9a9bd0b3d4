"""Schema migrations (Alembic): ``upgrade`` to the newest revision, and where a store stands."""

from __future__ import annotations

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine, inspect

from ..errors import ServiceError
from .tables import Base


class SchemaError(ServiceError):
    """The store's schema is not the one this version needs."""

    status = 503
    code = "schema_outdated"


def alembic_config(engine: Engine) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", "curvekeeper.store:migrations")
    cfg.set_main_option("sqlalchemy.url", engine.url.render_as_string(hide_password=False))
    return cfg


def head_revision(engine: Engine) -> str | None:
    return ScriptDirectory.from_config(alembic_config(engine)).get_current_head()


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Bring the schema up to ``revision`` in one transaction."""
    cfg = alembic_config(engine)
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)


def prepare(engine: Engine) -> None:
    """Create the schema of an empty store by migrations; refuse a store whose schema is
    behind (it needs ``curvekeeper db upgrade``, after a backup) or unknown."""
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
