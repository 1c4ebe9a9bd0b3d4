"""A store error other than a lock is logged with the database's own message and answers
503 with a reason that tells it from lock contention (a full disk is not 'busy')."""

from __future__ import annotations

import logging
import sqlite3
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import event


class Raise:
    """Makes every SQL statement fail with ``error`` while installed."""

    def __init__(self, client: TestClient, error: Exception) -> None:
        self.engine = client.app.state.ctx.store.engine  # type: ignore[attr-defined]
        self.error = error

    def _before(self, *_: Any) -> None:
        raise self.error

    def __enter__(self) -> None:
        event.listen(self.engine, "before_cursor_execute", self._before)

    def __exit__(self, *_: Any) -> None:
        event.remove(self.engine, "before_cursor_execute", self._before)


def _errors(dialect: str) -> list[tuple[Exception, str, str]]:
    """(driver error, the reason the 503 gives, text the log must hold), per backend."""
    if dialect == "postgresql":
        import psycopg
        from psycopg import errors as pg

        return [(pg.DiskFull("could not extend file: No space left on device"), "disk_full", "No space left"),
                (pg.LockNotAvailable("could not obtain lock on row"), "locked", "could not obtain lock"),
                (psycopg.OperationalError("server closed the connection unexpectedly"), "unreachable",
                 "server closed the connection")]
    return [(sqlite3.OperationalError("database or disk is full"), "disk_full", "database or disk is full"),
            (sqlite3.OperationalError("database is locked"), "locked", "database is locked"),
            (sqlite3.OperationalError("attempt to write a readonly database"), "read_only", "readonly database")]


def test_store_errors_are_told_apart_in_the_answer_and_the_log(
        client: TestClient, admin: dict[str, str], caplog: pytest.LogCaptureFixture) -> None:
    dialect = client.app.state.ctx.store.engine.dialect.name  # type: ignore[attr-defined]
    for error, reason, logged in _errors(dialect):
        caplog.clear()
        with caplog.at_level(logging.WARNING, logger="curvekeeper"), Raise(client, error):
            r = client.post("/v1/channels", headers=admin,
                            json={"id": "site-a.e1", "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 1}],
                                  "output": {"unit": "V"}})
        assert r.status_code == 503 and r.headers.get("Retry-After"), r.text
        assert r.json()["error"]["details"]["reason"] == reason, (error, r.text)
        lines = [rec.getMessage() for rec in caplog.records]
        assert any(logged in line and reason in line for line in lines), (error, lines)
    assert client.get("/v1/channels/site-a.e1", headers=admin).status_code == 404
