"""A key's last use (``api_key.last_used_at``): written on an authenticated request at most
once a minute per key (``KeyUse`` in ``service/curvekeeper/api/deps.py``, here with a clock
the test moves), shown by ``GET /v1/keys``."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from curvekeeper.api.deps import KeyUse
from fastapi.testclient import TestClient

from tests.api.helpers import ok
from tests.conftest import auth


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def listed(client: TestClient, admin: dict[str, str], kid: str) -> dict[str, Any]:
    items = ok(client.get("/v1/keys", params={"limit": 1000}, headers=admin))["items"]
    return next(k for k in items if k["id"] == kid)  # type: ignore[no-any-return]


def test_last_use_is_written_at_most_once_a_minute_per_key(client: TestClient, admin: dict[str, str]) -> None:
    clock = Clock()
    client.app.state.ctx.key_use = KeyUse(interval=60.0, clock=clock)  # type: ignore[attr-defined]
    made = ok(client.post("/v1/keys", json={"role": "technician", "label": "bench"}, headers=admin), 201)
    kid, tech = made["id"], auth(made["secret"])
    assert made["last_used_at"] is None
    assert listed(client, admin, kid)["last_used_at"] is None  # made, not used

    ok(client.get("/v1/channels", headers=tech))
    first = listed(client, admin, kid)["last_used_at"]
    assert first is not None and datetime.fromisoformat(first) >= datetime.fromisoformat(made["created_at"])

    clock.now += 59.0  # within the minute: uses are not written
    for _ in range(3):
        ok(client.get("/v1/channels", headers=tech))
    client.get("/v1/channels/site-a.nope", headers=tech)  # a refused request is a use too, still not written
    assert listed(client, admin, kid)["last_used_at"] == first

    clock.now += 1.0  # a minute after the last write
    ok(client.get("/v1/channels", headers=tech))
    second = listed(client, admin, kid)["last_used_at"]
    assert datetime.fromisoformat(second) > datetime.fromisoformat(first)


def test_each_key_has_its_own_minute(client: TestClient, admin: dict[str, str]) -> None:
    clock = Clock()
    client.app.state.ctx.key_use = KeyUse(interval=60.0, clock=clock)  # type: ignore[attr-defined]
    a = ok(client.post("/v1/keys", json={"role": "technician"}, headers=admin), 201)
    b = ok(client.post("/v1/keys", json={"role": "technician"}, headers=admin), 201)
    ok(client.get("/v1/channels", headers=auth(a["secret"])))
    assert listed(client, admin, a["id"])["last_used_at"] is not None
    assert listed(client, admin, b["id"])["last_used_at"] is None
    ok(client.get("/v1/channels", headers=auth(b["secret"])))  # b's first use, in a's minute
    assert listed(client, admin, b["id"])["last_used_at"] is not None


def test_a_refused_key_records_no_use(client: TestClient, admin: dict[str, str]) -> None:
    made = ok(client.post("/v1/keys", json={"role": "technician"}, headers=admin), 201)
    ok(client.delete(f"/v1/keys/{made['id']}", headers=admin))
    r = client.get("/v1/channels", headers=auth(made["secret"]))
    assert r.status_code == 401
    assert listed(client, admin, made["id"])["last_used_at"] is None


def test_key_use_throttle() -> None:
    clock = Clock()
    use = KeyUse(interval=60.0, clock=clock)
    assert use.due("k_a") and not use.due("k_a") and use.due("k_b")
    clock.now += 59.999
    assert not use.due("k_a")
    clock.now += 0.001
    assert use.due("k_a") and not use.due("k_a")
