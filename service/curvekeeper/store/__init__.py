"""The store: engine, one transaction per request, and the repository."""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy.engine import make_url
from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import sessionmaker

from ..errors import StoreBusy
from . import migrate
from .engine import is_sqlite, make_engine
from .repository import Repository

__all__ = ["Repository", "Store", "WriteLockTaken", "failure_reason"]

# PostgreSQL error classes (SQLSTATE) that mean another transaction holds what we need
_PG_LOCKED = {"55P03", "40P01", "40001", "57014"}


def failure_reason(error: BaseException | None) -> str:
    """Why the database refused, as the 503's ``details.reason``: ``locked`` (another
    writer; retrying helps), ``disk_full``, ``read_only``, ``io_error``, ``unreachable``,
    or ``operational_error``. Only lock contention is "busy": the others need an operator."""
    if error is None:
        return "operational_error"
    sqlstate = getattr(error, "sqlstate", None)
    if sqlstate is not None:  # PostgreSQL: classify by the SQLSTATE, not the wording
        return ("locked" if sqlstate in _PG_LOCKED else "disk_full" if sqlstate == "53100"
                else "unreachable" if sqlstate.startswith(("08", "57P")) else "operational_error")
    text = str(error).lower()
    if "locked" in text or "busy" in text:
        return "locked"
    if "disk is full" in text or "no space left" in text:
        return "disk_full"
    if "readonly" in text or "read-only" in text:
        return "read_only"
    if "disk i/o" in text:
        return "io_error"
    if getattr(type(error), "__module__", "").startswith("psycopg"):
        return "unreachable"  # psycopg without SQLSTATE: no server answered (connection lost or refused)
    return "operational_error"


class WriteLockTaken(Exception):
    """``transaction(write=True, wait=False)`` found the write lock held elsewhere: nothing
    was done; run the work again with ``wait=True``."""


class Store:
    """Owns the engine. ``transaction(write=True)`` takes the write lock up front
    (SQLite ``BEGIN IMMEDIATE``; row locks on PostgreSQL), commits on success and
    rolls back on any error; a locked or unreachable database raises ``StoreBusy``.

    ``inline`` is true where a short transaction never waits on the network: SQLite. There
    the HTTP layer runs small requests on its event loop, with ``wait=False``: on the loop's
    own connection (its units run one at a time, so it never waits for a connection behind
    worker threads), and for writes the write lock is taken only if it is free at once, else
    ``WriteLockTaken`` is raised before anything is done (the request then waits for the
    lock in a worker thread). ``deadline`` (``time.monotonic()``) bounds a write's wait for
    the lock (SQLite): a request queued for a worker thread waits the busy timeout in all,
    not on top of its time in the queue."""

    def __init__(self, url: str, *, busy_timeout_s: float = 5.0, prepare_schema: bool = True) -> None:
        self.url = url
        self.busy_timeout_s = busy_timeout_s
        self.engine = make_engine(url, busy_timeout_s=busy_timeout_s)
        if prepare_schema:
            try:
                migrate.prepare(self.engine)
            except BaseException:
                self.engine.dispose()
                raise
        self._read = sessionmaker(self.engine, expire_on_commit=False)
        self._write = sessionmaker(self.engine.execution_options(immediate=True), expire_on_commit=False)
        self.inline = is_sqlite(url)
        memory = self.inline and make_url(url).database in (None, "", ":memory:")
        loop = make_engine(url, busy_timeout_s=busy_timeout_s, connections=1) if self.inline and not memory \
            else self.engine
        self._loop_engine = loop
        self._loop_read = sessionmaker(loop, expire_on_commit=False)
        self._loop_write = sessionmaker(loop.execution_options(immediate=True, busy_ms=0), expire_on_commit=False)

    @contextmanager
    def transaction(self, *, write: bool, wait: bool = True, deadline: float | None = None) -> Iterator[Repository]:
        if not wait and self.inline:
            session = (self._loop_write if write else self._loop_read)()
            if write:
                try:
                    session.connection()  # BEGIN IMMEDIATE now, without waiting (on the driver)
                except (OperationalError, sqlite3.OperationalError) as exc:
                    session.close()
                    raise WriteLockTaken() from exc
        else:
            session = (self._write if write else self._read)()
        try:
            if write and self.inline and deadline is not None:
                # BEGIN IMMEDIATE waiting only what is left until the deadline
                session.connection(execution_options={"busy_ms": (deadline - time.monotonic()) * 1000})
            repo = Repository(session)
            yield repo
            session.commit()
        except (OperationalError, sqlite3.OperationalError) as exc:  # the latter: BEGIN on the driver
            session.rollback()
            # the reason tells lock contention from a full disk or a lost server; the
            # driver's own message stays on the cause, for the log (it may name hosts)
            orig = exc.orig if isinstance(exc, OperationalError) else exc
            raise StoreBusy("the store is busy or unavailable; retry shortly",
                            details={"reason": failure_reason(orig)}) from exc
        except BaseException:
            session.rollback()
            raise
        finally:
            session.close()

    def dispose(self) -> None:
        self.engine.dispose()
        self._loop_engine.dispose()
