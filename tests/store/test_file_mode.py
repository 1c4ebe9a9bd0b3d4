"""Store files are private: a new SQLite store, its -wal and -shm files, and a backup
are readable by their owner only (0600) whatever the umask; a file that already exists
keeps the mode its operator gave it."""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import pytest
from curvekeeper.cli import main
from curvekeeper.store import Store
from sqlalchemy import text


@pytest.fixture(autouse=True)
def open_umask() -> Iterator[None]:
    old = os.umask(0o022)  # the usual default, which leaves new files world-readable
    try:
        yield
    finally:
        os.umask(old)


def mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def test_a_new_store_and_its_wal_and_shm_are_private(tmp_path: Path) -> None:
    db = tmp_path / "new.db"
    store = Store(f"sqlite:///{db}")
    try:
        with store.engine.connect() as conn:  # an open connection keeps -wal and -shm
            conn.execute(text("SELECT count(*) FROM channel")).scalar()
            files = [db, tmp_path / "new.db-wal", tmp_path / "new.db-shm"]
            assert all(f.exists() for f in files)
            assert {f.name: oct(mode(f)) for f in files} == {f.name: "0o600" for f in files}
    finally:
        store.dispose()


def test_an_existing_store_keeps_its_mode(tmp_path: Path) -> None:
    db = tmp_path / "shared.db"
    Store(f"sqlite:///{db}").dispose()
    db.chmod(0o640)  # the operator lets a backup group read it
    store = Store(f"sqlite:///{db}")
    try:
        with store.engine.connect() as conn:
            conn.execute(text("SELECT count(*) FROM channel")).scalar()
            assert mode(db) == 0o640 and mode(tmp_path / "shared.db-wal") == 0o640
    finally:
        store.dispose()


def test_a_backup_is_private(tmp_path: Path) -> None:
    db = tmp_path / "s.db"
    Store(f"sqlite:///{db}").dispose()
    copy = tmp_path / "copy.db"
    assert main(["db", "backup", str(copy), "--db", f"sqlite:///{db}"]) == 0
    assert mode(copy) == 0o600
