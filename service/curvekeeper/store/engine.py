"""Engine set-up. SQLite: WAL, synchronous=FULL (an acknowledged sample survives
power loss), a busy timeout, foreign keys on, and ``BEGIN IMMEDIATE`` for write
transactions so two writers never interleave a read-modify-write of one channel.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.pool import StaticPool


def is_sqlite(url: str) -> bool:
    return make_url(url).get_backend_name() == "sqlite"


# a store holds readings and key hashes: new files are the owner's only. SQLite gives the
# -wal and -shm files the database file's mode, so setting it once at creation covers all
# three; an existing file keeps whatever mode its operator chose (e.g. 0640 for a backup group)
PRIVATE_MODE = 0o600


def _plain_file(database: str | None) -> Path | None:
    """The file an SQLite URL's database names; None for memory and for ``file:`` URIs
    (their options, such as ``mode=ro``, decide whether a file may be created)."""
    if database in (None, "", ":memory:") or database.startswith("file:"):
        return None
    return Path(database)


def create_private(path: Path) -> bool:
    """Creates ``path`` empty with mode 0600 (whatever the umask) unless it exists; True
    if it was created. A missing folder is left for SQLite to report."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, PRIVATE_MODE)
    except (FileExistsError, FileNotFoundError):
        return False
    try:
        os.fchmod(fd, PRIVATE_MODE)  # os.open's mode is narrowed by the umask, never widened: be exact
    finally:
        os.close(fd)
    return True


#: SQLite connections a process may open: more than the worker threads that can use them at
#: once (anyio's default 40), so a thread never waits for a connection on top of the lock
SQLITE_CONNECTIONS = 48


def make_engine(url: str, *, busy_timeout_s: float = 5.0, connections: int = SQLITE_CONNECTIONS) -> Engine:
    """An engine for ``url`` (the schema is the migrations' business: ``curvekeeper.store.migrate``).
    SQL parameters are kept out of logs and error messages: they hold readings and key hashes.
    SQLite: at most ``connections`` connections, and a checkout waits at most the busy timeout.
    A write transaction with the execution option ``busy_ms`` waits that long for the write
    lock instead of the busy timeout (0: not at all)."""
    if is_sqlite(url):
        u = make_url(url)
        memory = u.database in (None, "", ":memory:")
        if (path := _plain_file(u.database)) is not None:
            create_private(path)  # before SQLite creates it with the umask's mode (often 0644)
        kwargs: dict[str, Any] = {"poolclass": StaticPool} if memory else {
            "pool_size": min(8, connections), "max_overflow": max(0, connections - 8),
            "pool_timeout": busy_timeout_s}
        engine = create_engine(
            url, connect_args={"check_same_thread": False, "timeout": busy_timeout_s}, hide_parameters=True,
            **kwargs
        )
        _sqlite_events(engine, busy_timeout_s)
    else:
        engine = create_engine(url, pool_pre_ping=True, pool_size=10, max_overflow=10, hide_parameters=True)
    return engine


def _sqlite_events(engine: Engine, busy_timeout_s: float) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None  # we issue BEGIN ourselves
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=FULL")
        cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_s * 1000)}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        options = conn.get_execution_options()
        busy_ms = options.get("busy_ms")
        if not options.get("immediate", False):
            conn.exec_driver_sql("BEGIN")
        elif busy_ms is None:
            conn.exec_driver_sql("BEGIN IMMEDIATE")
        else:  # wait busy_ms for the write lock, 0: only if free right now (on the driver: per request)
            raw = conn.connection.dbapi_connection
            raw.execute(f"PRAGMA busy_timeout={max(0, int(busy_ms))}")
            try:
                raw.execute("BEGIN IMMEDIATE")
            finally:
                raw.execute(f"PRAGMA busy_timeout={int(busy_timeout_s * 1000)}")
