"""The store: engine, one transaction per request, and the repository."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import sessionmaker

from ..errors import StoreBusy
from . import migrate
from .cache import VersionCache
from .engine import make_engine
from .repository import Repository

__all__ = ["Repository", "Store"]


class Store:
    """Owns the engine. ``transaction(write=True)`` takes the write lock up front
    (SQLite ``BEGIN IMMEDIATE``; row locks on PostgreSQL), commits on success and
    rolls back on any error; a locked or unreachable database raises ``StoreBusy``."""

    def __init__(self, url: str, *, busy_timeout_s: float = 5.0, prepare_schema: bool = True) -> None:
        self.url = url
        self.engine = make_engine(url, busy_timeout_s=busy_timeout_s)
        if prepare_schema:
            try:
                migrate.prepare(self.engine)
            except BaseException:
                self.engine.dispose()
                raise
        self._read = sessionmaker(self.engine, expire_on_commit=False)
        self._write = sessionmaker(self.engine.execution_options(immediate=True), expire_on_commit=False)
        self.models = VersionCache()

    @contextmanager
    def transaction(self, *, write: bool) -> Iterator[Repository]:
        session = (self._write if write else self._read)()
        try:
            repo = Repository(session, self.models)
            yield repo
            session.commit()
        except OperationalError as exc:
            session.rollback()
            raise StoreBusy("the store is busy or unavailable; retry shortly",
                            details={"reason": type(exc.orig).__name__ if exc.orig else "operational"}
                            ) from exc
        except BaseException:
            session.rollback()
            raise
        finally:
            session.close()
        for fn in repo.committed:
            fn()

    def dispose(self) -> None:
        self.engine.dispose()
