"""Helpers shared by the API tests."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from datetime import datetime
from typing import Any

import httpx
from fastapi.testclient import TestClient

from tests.conftest import store_fingerprint

Headers = dict[str, str]
Keys = dict[str, Headers]

#: a 422 comes from the request schema (validation_error) or from the rules below it
CODES_422 = {"validation_error", "invalid_request"}


def expect_error(
    client: TestClient,
    method: str,
    url: str,
    status: int,
    code: str | set[str],
    *,
    headers: Headers | None = None,
    json: Any = None,
    text: str | None = None,
    params: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """Send a request that must fail: check status, error code (one, or one of a set) and
    message, and that the store is exactly as before. Returns the error object."""
    before = store_fingerprint(client)
    h = dict(headers or {})
    if text is not None:
        h["content-type"] = "application/json"
    r = client.request(method, url, headers=h, json=json, content=text, params=params)
    assert r.status_code == status, r.text[:800]
    err = r.json()["error"]
    assert err["code"] in ({code} if isinstance(code, str) else code), err
    assert isinstance(err["message"], str) and err["message"], err
    assert store_fingerprint(client) == before, "a failed request changed the store"
    return err  # type: ignore[no-any-return]


def ok(r: Any, status: int = 200) -> Any:
    """The JSON body of an answer that must have this status."""
    assert r.status_code == status, r.text[:800]
    return r.json()


def assert_error(r: httpx.Response, status: int, code: str | set[str]) -> dict[str, Any]:
    """The contract's error body, with this status and code (or one of these codes);
    returns ``error``."""
    assert r.status_code == status, r.text
    body = r.json()
    assert set(body) == {"error"}, body
    err: dict[str, Any] = body["error"]
    assert err["code"] in ({code} if isinstance(code, str) else code), err
    assert isinstance(err["message"], str) and err["message"], err
    assert "details" in err
    return err


class Cases:
    """Many small cases in one test (one store, one set-up); every failing case is
    reported by name, not just the first."""

    def __init__(self) -> None:
        self.failed: list[str] = []

    @contextmanager
    def case(self, name: str) -> Iterator[None]:
        try:
            yield
        except AssertionError as exc:
            self.failed.append(f"[{name}] {exc}")

    def done(self) -> None:
        assert not self.failed, f"{len(self.failed)} case(s) failed:\n" + "\n".join(self.failed)


def stored_state(client: TestClient, channel_id: str) -> dict[str, Any]:
    """The channel's model state as stored (read straight from the store)."""
    from curvekeeper.store.tables import Channel, ChannelState
    from sqlalchemy import select

    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        state: dict[str, Any] = repo.session.scalars(
            select(ChannelState.model_state).join(Channel, Channel.pk == ChannelState.channel_pk)
            .where(Channel.id == channel_id)).one()
    return state


class Clock:
    """Aware UTC time that moves only when a test sets ``now`` (``create_app(clock=...)``)."""

    def __init__(self, now: datetime) -> None:
        self.now = now

    def __call__(self) -> datetime:
        return self.now
