"""Faults in the store: with the database failing mid-request, every route answers 503
with Retry-After and the error body, and once the fault clears the state is exactly the
state before the failed request."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import event

from tests.conftest import store_fingerprint

CH = "site-a.f1"


class Fault:
    """Makes the n-th SQL statement from now (1-based) and every one after it fail like
    an unreachable or read-only database, until cleared."""

    def __init__(self, client: TestClient) -> None:
        self.engine = client.app.state.ctx.store.engine  # type: ignore[attr-defined]
        self.countdown: int | None = None
        self.fired = 0
        event.listen(self.engine, "before_cursor_execute", self._before)

    def _before(self, conn: Any, cursor: Any, statement: str, params: Any, context: Any, many: bool) -> None:
        if self.countdown is None:
            return
        self.countdown -= 1
        if self.countdown <= 0:
            self.fired += 1
            raise _driver_error(self.engine.dialect.name)

    @contextmanager
    def at(self, n: int) -> Iterator[None]:
        self.countdown, self.fired = n, 0
        try:
            yield
        finally:
            self.countdown = None

    def remove(self) -> None:
        event.remove(self.engine, "before_cursor_execute", self._before)


def _driver_error(dialect: str) -> Exception:
    if dialect == "postgresql":
        import psycopg

        return psycopg.OperationalError("server closed the connection unexpectedly")
    import sqlite3

    return sqlite3.OperationalError("attempt to write a readonly database")


@pytest.fixture
def seeded(client: TestClient, admin: dict[str, str]) -> dict[str, Any]:
    """A channel with samples, a calibration and a snapshot; ids to use in the routes."""
    r = client.post("/v1/channels", headers=admin, json={
        "id": CH, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}], "output": {"unit": "V"}})
    assert r.status_code == 201
    client.post(f"/v1/channels/{CH}/samples", headers=admin,
                json={"source": "s", "samples": [{"x": float(i), "y": 2.0 * i + 1, "seq": i} for i in range(40)]})
    snap = client.post(f"/v1/channels/{CH}/snapshots", headers=admin, json={"label": "known good"}).json()
    key = client.post("/v1/keys", headers=admin, json={"role": "technician"}).json()
    return {"snapshot": snap["id"], "key": key["id"]}


def requests(ids: dict[str, Any]) -> list[tuple[str, str, Any]]:
    """One valid request per route that touches the store."""
    return [
        ("GET", "/readyz", None),
        ("POST", "/v1/channels", {"id": "site-a.f2", "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 1}],
                                  "output": {"unit": "V"}}),
        ("GET", "/v1/channels", None),
        ("GET", f"/v1/channels/{CH}", None),
        ("PATCH", f"/v1/channels/{CH}", {"drift": {"tolerance": 0.5}}),
        ("POST", f"/v1/channels/{CH}/samples", {"source": "s", "samples": [{"x": 50.0, "y": 101.0, "seq": 999}]}),
        ("POST", "/v1/samples", {"samples": [{"channel": CH, "x": 60.0, "y": 121.0}]}),
        ("POST", f"/v1/channels/{CH}/predict", {"x": [10.0]}),
        ("GET", f"/v1/channels/{CH}/curve?points=5", None),
        ("POST", f"/v1/channels/{CH}/calibrate", {"points": [{"x": 0, "y": 1.0}, {"x": 100, "y": 201.0}]}),
        # a calibration with scatter, then samples well off it: a drift alarm to acknowledge
        ("POST", f"/v1/channels/{CH}/calibrate", {"points": [{"x": float(x), "y": 2.0 * x + 1 + 0.05 * (-1) ** i}
                                                             for i, x in enumerate(range(0, 101, 10))]}),
        ("POST", f"/v1/channels/{CH}/samples", {"samples": [{"x": float(x), "y": 2.0 * x + 2} for x in range(30)]}),
        ("POST", f"/v1/channels/{CH}/acknowledge", {"note": "checked"}),
        ("POST", f"/v1/channels/{CH}/service", {"state": "out_of_service", "note": "repair"}),
        ("GET", f"/v1/channels/{CH}/snapshots", None),
        ("POST", f"/v1/channels/{CH}/snapshots", {"label": "x"}),
        ("GET", f"/v1/channels/{CH}/snapshots/{ids['snapshot']}", None),
        ("POST", f"/v1/channels/{CH}/rollback", {"snapshot": ids["snapshot"]}),
        ("GET", f"/v1/channels/{CH}/events", None),
        ("GET", f"/v1/channels/{CH}/samples", None),
        ("POST", "/v1/keys", {"role": "device", "prefixes": ["site-a."]}),
        ("GET", "/v1/keys", None),
        ("DELETE", f"/v1/keys/{ids['key']}", None),
    ]


def test_every_route_answers_503_and_changes_nothing_while_the_store_fails(
        client: TestClient, admin: dict[str, str], seeded: dict[str, Any]) -> None:
    fault = Fault(client)
    try:
        for method, path, body in requests(seeded):
            # fail at every statement the request makes in turn, until it gets through
            for n in range(1, 40):
                before = store_fingerprint(client)
                with fault.at(n):
                    r = client.request(method, path, json=body, headers=admin)
                if not fault.fired:
                    # the request made fewer than n statements: it must have succeeded, so undo
                    # nothing and go on to the next route
                    assert r.status_code < 400, f"{method} {path}: {r.status_code} {r.text}"
                    break
                assert r.status_code == 503, f"{method} {path} failing at statement {n}: {r.status_code} {r.text}"
                assert r.headers.get("Retry-After")
                assert r.json()["error"]["code"] in ("store_busy", "store_unavailable")
                assert store_fingerprint(client) == before, f"{method} {path} at statement {n} left a change"
    finally:
        fault.remove()


def test_liveness_answers_while_the_store_fails(client: TestClient) -> None:
    fault = Fault(client)
    try:
        with fault.at(1):
            assert client.get("/healthz").status_code == 200
            r = client.get("/readyz")
            assert r.status_code == 503 and r.headers.get("Retry-After")
    finally:
        fault.remove()
