"""The schema comes from the migrations, and equals the tables the code declares."""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from curvekeeper.store import Store, migrate
from curvekeeper.store.engine import make_engine
from curvekeeper.store.tables import Base
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url


@pytest.fixture(params=["sqlite", "postgresql"])
def empty_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty database on each backend (PostgreSQL: a new database, dropped afterwards)."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'empty.db'}"
        return
    server = os.environ.get("CURVEKEEPER_TEST_DATABASE_URL")
    if not server:
        pytest.skip("PostgreSQL tests need CURVEKEEPER_TEST_DATABASE_URL pointing at a server")
    name = f"ck_mig_{uuid.uuid4().hex[:12]}"
    admin = create_engine(make_url(server).set(database="postgres"), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f"CREATE DATABASE {name}"))
    try:
        yield make_url(server).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
        admin.dispose()


def test_migrations_from_empty_give_the_declared_schema(empty_url: str) -> None:
    engine = make_engine(empty_url)
    try:
        migrate.upgrade(engine)
        assert migrate.current_revision(engine) == migrate.head_revision(engine)
        with engine.connect() as conn:
            diffs = compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}),
                                     Base.metadata)
        assert diffs == []
    finally:
        engine.dispose()


def test_a_new_store_is_migrated_on_start_and_an_old_one_is_refused(empty_url: str) -> None:
    store = Store(empty_url)  # what `curvekeeper serve` does: an empty store gets the schema
    assert migrate.current_revision(store.engine) == migrate.head_revision(store.engine)
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '0000'"))
    store.dispose()
    with pytest.raises(migrate.SchemaError, match="db upgrade"):
        Store(empty_url)


def test_tables_made_outside_the_migrations_are_refused(empty_url: str) -> None:
    engine = make_engine(empty_url)
    Base.metadata.create_all(engine)
    try:
        with pytest.raises(migrate.SchemaError, match="no migration history"):
            migrate.prepare(engine)
    finally:
        engine.dispose()
