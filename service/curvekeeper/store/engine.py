"""Engine set-up. SQLite: WAL, synchronous=FULL (an acknowledged sample survives
power loss), a busy timeout, foreign keys on, and ``BEGIN IMMEDIATE`` for write
transactions so two writers never interleave a read-modify-write of one channel.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.pool import StaticPool


def is_sqlite(url: str) -> bool:
    return make_url(url).get_backend_name() == "sqlite"


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
