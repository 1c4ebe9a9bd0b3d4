"""The admin commands (`keys create`, `db upgrade`, `db backup`, `replay`) use an existing
store and never create one: a missing store, or one without our schema, is refused (exit 2)
with the store tried and how to choose another; the store used is named on stderr."""

from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from curvekeeper import auth
from curvekeeper.cli import main
from curvekeeper.store import Store
from curvekeeper.store.tables import Event
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, select, text
from sqlalchemy.engine import make_url

from tests.conftest import NO_PG, PG_URL

ENV = "CURVEKEEPER_DATABASE_URL"
COMMANDS = {
    "keys create": ["keys", "create", "--role", "device"],
    "db upgrade": ["db", "upgrade"],
    "db backup": ["db", "backup", "{dir}/copy.db"],
    "replay": ["replay", "site-a.p1", "--quiet"],
}
NEED_SCHEMA = [c for c in COMMANDS if c != "db upgrade"]  # db upgrade's job is to make the schema


def argv(command: str, where: Path, *extra: str) -> list[str]:
    return [a.format(dir=where) for a in COMMANDS[command]] + list(extra)


def tree(path: Path) -> dict[str, bytes]:
    """Every file under ``path`` with a digest of its bytes."""
    return {str(p.relative_to(path)): hashlib.sha256(p.read_bytes()).digest()
            for p in sorted(path.rglob("*")) if p.is_file()}


def assert_refused(err: str, *names: str) -> None:
    assert "--db" in err and ENV in err, err
    for name in names:
        assert name in err, (name, err)
    assert len(err.strip().splitlines()) == 1, err


@pytest.fixture
def workdir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """An empty working directory and no store chosen in the environment."""
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    monkeypatch.delenv(ENV, raising=False)
    return work


# a missing store ------------------------------------------------------------------------
@pytest.mark.parametrize("command", list(COMMANDS))
def test_a_missing_store_is_refused_and_nothing_is_created(command: str, workdir: Path,
                                                           monkeypatch: pytest.MonkeyPatch,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    # the default store, in the working directory
    assert main(argv(command, workdir)) == 2
    cap = capsys.readouterr()
    assert_refused(cap.err, f"no store at {workdir / 'curvekeeper.db'}", "the default")
    assert cap.out == ""
    # one named with --db
    assert main(argv(command, workdir, "--db", f"sqlite:///{workdir / 'elsewhere.db'}")) == 2
    assert_refused(capsys.readouterr().err, str(workdir / "elsewhere.db"), "--db)")
    # one named in the environment
    monkeypatch.setenv(ENV, "sqlite:///from-env.db")
    assert main(argv(command, workdir)) == 2
    assert_refused(capsys.readouterr().err, str(workdir / "from-env.db"), f"{ENV})")
    # an in-memory store is empty by nature
    assert main(argv(command, workdir, "--db", "sqlite://")) == 2
    assert_refused(capsys.readouterr().err, "in-memory")
    assert tree(workdir) == {}


@pytest.mark.parametrize("command", NEED_SCHEMA)
def test_a_file_without_our_schema_is_refused_and_left_as_it_was(command: str, workdir: Path,
                                                                 capsys: pytest.CaptureFixture[str]) -> None:
    (workdir / "empty.db").write_bytes(b"")
    other = sqlite3.connect(workdir / "other.db")
    other.execute("CREATE TABLE readings (x REAL)")
    other.commit()
    other.close()
    (workdir / "notes.db").write_text("not a database at all, but long enough to be read as one " * 4)
    before = tree(workdir)
    for name in ("empty.db", "other.db", "notes.db"):
        assert main(argv(command, workdir, "--db", f"sqlite:///{name}")) == 2, name
        err = capsys.readouterr().err
        assert_refused(err, str(workdir / name))
        assert "no curvekeeper schema" in err or "not an SQLite store" in err, err
    assert tree(workdir) == before


def test_db_upgrade_makes_the_schema_in_an_existing_empty_file(workdir: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    (workdir / "new.db").write_bytes(b"")
    assert main(["db", "upgrade", "--db", "sqlite:///new.db"]) == 0
    cap = capsys.readouterr()
    assert "(was empty)" in cap.out
    assert f"db upgrade: store sqlite:///new.db (--db; file {workdir / 'new.db'})" in cap.err
    assert main(["keys", "create", "--role", "technician", "--db", "sqlite:///new.db"]) == 0  # now a store
    assert sorted(tree(workdir)) == ["new.db"]


# an existing store ----------------------------------------------------------------------
@pytest.fixture
def existing(client: TestClient, admin: dict[str, str], database_url: str) -> str:
    """A store in use (SQLite and PostgreSQL) with one channel."""
    r = client.post("/v1/channels", headers=admin, json={
        "id": "site-a.p1", "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
        "output": {"name": "pressure", "unit": "kPa"}, "basis": {"kind": "poly", "degree": 1}})
    assert r.status_code == 201, r.text
    return database_url


def named(url: str) -> str:
    u = make_url(url)
    return f"store {u.render_as_string(hide_password=True)} (--db" + (
        f"; file {Path(u.database or '').resolve()})" if u.get_backend_name() == "sqlite" else ")")


def test_keys_create_uses_the_store_and_the_one_key_path(existing: str, workdir: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["keys", "create", "--role", "device", "--prefix", "site-a.", "--label", "gateway 3",
                 "--db", existing]) == 0
    cap = capsys.readouterr()
    assert f"keys create: {named(existing)}" in cap.err
    made = json.loads(cap.out)
    store = Store(existing)
    try:
        with store.transaction(write=False) as repo:
            who = auth.authenticate(repo, f"Bearer {made['secret']}")
            events = [e for e in repo.session.scalars(select(Event).where(Event.kind == "key_created"))
                      if e.details["id"] == made["id"]]
    finally:
        store.dispose()
    assert (who.key_id, who.role, who.prefixes) == (made["id"], "device", ["site-a."])
    assert [(e.key_id, e.details) for e in events] == [
        (None, {"id": made["id"], "role": "device", "prefixes": ["site-a."], "label": "gateway 3",
                "by": "command line"})]
    # the action's rule, said on the command line: prefixes are for device keys
    assert main(["keys", "create", "--role", "technician", "--prefix", "site-a.", "--db", existing]) == 2
    assert "prefixes limit device keys only" in capsys.readouterr().err
    assert tree(workdir) == {}


def test_db_upgrade_replay_and_backup_name_the_store_they_use(existing: str, workdir: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["db", "upgrade", "--db", existing]) == 0
    cap = capsys.readouterr()
    assert f"db upgrade: {named(existing)}" in cap.err and "schema at revision" in cap.out
    assert main(["replay", "site-a.p1", "--check", "--quiet", "--db", existing]) == 0
    cap = capsys.readouterr()
    assert f"replay: {named(existing)}" in cap.err and "bit for bit" in cap.out
    copy = workdir / "copy.db"
    if make_url(existing).get_backend_name() == "sqlite":
        assert main(["db", "backup", str(copy), "--db", existing]) == 0
        cap = capsys.readouterr()
        assert f"db backup: {named(existing)}" in cap.err and "integrity: ok" in cap.out
        assert main(["replay", "site-a.p1", "--check", "--quiet", "--db", f"sqlite:///{copy}"]) == 0
    else:
        assert main(["db", "backup", str(copy), "--db", existing]) == 2
        err = capsys.readouterr().err
        assert "pg_dump" in err and make_url(existing).render_as_string(hide_password=True) in err
        assert not copy.exists()


# PostgreSQL: a database that is not there, or without our schema ------------------------
@pytest.fixture
def bare_postgres() -> Iterator[str]:
    """A new, empty PostgreSQL database beside the test database (dropped afterwards)."""
    if not PG_URL:
        pytest.skip(NO_PG)
    server = make_url(PG_URL)
    name = f"{server.database}_bare"
    admin = create_engine(server.set(database="postgres"), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        yield server.set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def tables(url: str) -> list[Any]:
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            return list(conn.execute(text("SELECT tablename FROM pg_tables WHERE schemaname = 'public'")).scalars())
    finally:
        engine.dispose()


def test_postgres_without_our_schema_is_refused_except_by_db_upgrade(bare_postgres: str, workdir: Path,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    shown = make_url(bare_postgres).render_as_string(hide_password=True)
    for command in ("keys create", "replay"):
        assert main(argv(command, workdir, "--db", bare_postgres)) == 2, command
        err = capsys.readouterr().err
        assert_refused(err, shown, "no curvekeeper schema")
        assert tables(bare_postgres) == []
    assert main(["db", "upgrade", "--db", bare_postgres]) == 0
    cap = capsys.readouterr()
    assert f"db upgrade: store {shown} (--db)" in cap.err and "(was empty)" in cap.out
    assert "alembic_version" in tables(bare_postgres)
    assert main(["keys", "create", "--role", "technician", "--db", bare_postgres]) == 0
    assert f"keys create: store {shown} (--db)" in capsys.readouterr().err
    assert tree(workdir) == {}


@pytest.mark.parametrize("command", list(COMMANDS))
def test_a_postgres_database_that_is_not_there_is_refused_with_its_password_masked(
        command: str, workdir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    if not PG_URL:
        pytest.skip(NO_PG)
    missing = make_url(PG_URL).set(password="s3cret-pw", database="ck_no_such_database").render_as_string(
        hide_password=False)
    assert main(argv(command, workdir, "--db", missing)) == 2
    err = capsys.readouterr().err
    assert "s3cret-pw" not in err and "***" in err and "ck_no_such_database" in err, err
    if command != "db backup":  # refused before any connection: a backup copies SQLite files
        assert_refused(err, "cannot open the store")
    assert tree(workdir) == {}


def test_an_older_schema_is_refused_not_upgraded_behind_the_users_back(sqlite_template: Path, workdir: Path,
                                                                        capsys: pytest.CaptureFixture[str]) -> None:
    old = workdir / "old.db"
    shutil.copyfile(sqlite_template, old)
    conn = sqlite3.connect(old)
    conn.execute("UPDATE alembic_version SET version_num = '0001'")
    conn.commit()
    conn.close()
    before = tree(workdir)
    for command in ("keys create", "replay"):
        assert main(argv(command, workdir, "--db", f"sqlite:///{old}")) == 2, command
        assert "db upgrade" in capsys.readouterr().err
    assert tree(workdir) == before
