"""API keys (``service/curvekeeper/api/routes/keys.py``), device-key scope, health, readiness, metrics
(``service/curvekeeper/api/routes/health.py``) and the start-up admin key (``CURVEKEEPER_ADMIN_KEY``).

Grouped per route, unauthorised and bad-input cases first. Every failing request
is checked for its status, ``error.code`` and an unchanged store.
"""

from __future__ import annotations

from typing import Any

import pytest
from curvekeeper.api import create_app
from curvekeeper.auth import hash_secret
from curvekeeper.config import Settings
from curvekeeper.store.tables import ApiKey
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from tests.api.helpers import Headers, expect_error, ok
from tests.conftest import ADMIN_SECRET, auth, store_fingerprint

Keys = dict[str, Headers]

KEYS = "/v1/keys"


# helpers ---------------------------------------------------------------------------




def new_key(client: TestClient, admin: Headers, **body: Any) -> dict[str, Any]:
    return ok(client.post(KEYS, json=body, headers=admin), 201)  # type: ignore[no-any-return]


def secret_of(headers: Headers) -> str:
    return headers["Authorization"].removeprefix("Bearer ")


def admin_key_rows(client: TestClient) -> int:
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        return int(
            repo.session.scalar(
                select(func.count())
                .select_from(ApiKey)
                .where(ApiKey.secret_hash == hash_secret(ADMIN_SECRET))
            )
            or 0
        )


# the Authorization header (service/curvekeeper/api/deps.py, service/curvekeeper/auth.py) ----------------------------
def test_only_the_bearer_scheme_is_accepted_even_for_a_recently_used_key(
    client: TestClient, keys: Keys
) -> None:
    """``authenticate`` refuses any scheme but Bearer; the key cache in ``deps.principal``
    must not let ``Basic <secret>`` (or no scheme at all) through just because the same
    secret was used a moment ago with Bearer."""
    tech = secret_of(keys["technician"])
    assert client.get("/v1/channels", headers=keys["technician"]).status_code == 200  # now cached
    for header in (f"Basic {tech}", f"Token {tech}", tech):
        expect_error(
            client, "GET", "/v1/channels", 401, "unauthorized", headers={"Authorization": header}
        )
    assert (
        client.get("/v1/channels", headers={"Authorization": f"bearer  {tech}"}).status_code == 200
    )


# POST /v1/keys ----------------------------------------------------------------------
def test_create_key_without_a_key_is_401(client: TestClient, keys: Keys) -> None:
    body = {"role": "device"}
    expect_error(client, "POST", KEYS, 401, "unauthorized", json=body)
    expect_error(
        client, "POST", KEYS, 401, "unauthorized", json=body, headers={"Authorization": "Basic abc"}
    )
    expect_error(client, "POST", KEYS, 401, "unauthorized", json=body, headers=keys["revoked"])


def test_create_key_needs_an_admin_key(client: TestClient, keys: Keys) -> None:
    for who in ("technician", "device", "other_device"):
        expect_error(
            client, "POST", KEYS, 403, "forbidden", json={"role": "device"}, headers=keys[who]
        )


def test_create_key_bad_body_is_422(client: TestClient, keys: Keys) -> None:
    admin = keys["admin"]
    for body in (
        {},
        {"role": "root"},
        {"role": "Admin"},
        {"role": "device", "prefixes": ["Site-A."]},
        {"role": "device", "prefixes": "site-a."},
        {"role": "device", "secret": "mine"},
        {"role": "device", "label": "x" * 257},
        {"role": "device", "prefixes": ["a"] * 65},
    ):
        expect_error(client, "POST", KEYS, 422, "validation_error", json=body, headers=admin)
    expect_error(client, "POST", KEYS, 400, "malformed_json", text='{"role": ', headers=admin)


def test_create_key_does_not_silently_ignore_prefixes(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    """Prefixes limit device keys only (the contract: "A device key may be limited to channel-id
    prefixes"). A technician key asked for with prefixes must either be refused, or be
    limited to them; storing and listing prefixes that have no effect misleads the admin."""
    make_channel("site-a.p1")
    r = client.post(
        KEYS, json={"role": "technician", "prefixes": ["site-b."]}, headers=keys["admin"]
    )
    if r.status_code == 422:
        return
    assert r.status_code == 201, r.text
    limited = auth(r.json()["secret"])
    expect_error(client, "GET", "/v1/channels/site-a.p1/curve", 403, "forbidden", headers=limited)


def test_create_key_shows_the_secret_once(client: TestClient, keys: Keys) -> None:
    out = new_key(client, keys["admin"], role="technician", label="bench laptop")
    assert out["id"].startswith("k_")
    assert out["secret"] and out["role"] == "technician" and out["prefixes"] == []
    assert out["label"] == "bench laptop" and out["created_at"] and out["revoked_at"] is None
    # the secret works, with the role it was given
    tech = auth(out["secret"])
    assert client.get("/v1/channels", headers=tech).status_code == 200
    assert client.get(KEYS, headers=tech).status_code == 403
    # and is stored only as its hash
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        row = repo.get_key(out["id"])
        assert row is not None and row.secret_hash == hash_secret(out["secret"])
        assert out["secret"] not in str([getattr(row, c.key) for c in ApiKey.__table__.columns])


# GET /v1/keys ----------------------------------------------------------------------------
def test_list_keys_without_a_key_is_401(client: TestClient, keys: Keys) -> None:
    expect_error(client, "GET", KEYS, 401, "unauthorized")
    expect_error(client, "GET", KEYS, 401, "unauthorized", headers=keys["revoked"])


def test_list_keys_needs_an_admin_key(client: TestClient, keys: Keys) -> None:
    for who in ("technician", "device"):
        expect_error(client, "GET", KEYS, 403, "forbidden", headers=keys[who])


def test_list_keys_bad_paging_is_422(client: TestClient, keys: Keys) -> None:
    expect_error(
        client, "GET", KEYS, 422, "validation_error", params={"limit": 0}, headers=keys["admin"]
    )
    expect_error(
        client, "GET", KEYS, 422, "invalid_request", params={"cursor": "%%%"}, headers=keys["admin"]
    )


def test_list_keys_never_shows_secrets(client: TestClient, keys: Keys) -> None:
    admin = keys["admin"]
    made = new_key(client, admin, role="device", prefixes=["site-a.", "site-c."], label="gateway 3")
    secrets = [made["secret"], *(secret_of(h) for h in keys.values())]
    r = client.get(KEYS, headers=admin)
    assert r.status_code == 200
    for s in secrets:
        assert s not in r.text
        assert hash_secret(s) not in r.text
    items = r.json()["items"]
    assert len(items) == 6  # the start-up admin key and the five made here
    for it in items:
        assert "secret" not in it and "secret_hash" not in it
        assert set(it) == {"id", "role", "prefixes", "label", "created_at", "revoked_at", "last_used_at"}
    mine = next(it for it in items if it["id"] == made["id"])
    assert mine["prefixes"] == ["site-a.", "site-c."] and mine["label"] == "gateway 3"
    assert sum(1 for it in items if it["revoked_at"] is not None) == 1  # the fixture's revoked key

    # paged one at a time: the same keys, none twice, no secrets either
    seen: list[str] = []
    cursor = None
    while True:
        page = client.get(
            KEYS, params={"limit": 1, **({"cursor": cursor} if cursor else {})}, headers=admin
        )
        assert page.status_code == 200
        assert not any(s in page.text for s in secrets)
        seen.extend(it["id"] for it in page.json()["items"])
        cursor = page.json()["next_cursor"]
        if cursor is None:
            break
    assert seen == [it["id"] for it in items] and len(set(seen)) == len(seen)


# DELETE /v1/keys/{kid} ---------------------------------------------------------------
def test_revoke_key_without_a_key_is_401(client: TestClient, keys: Keys) -> None:
    kid = new_key(client, keys["admin"], role="device")["id"]
    expect_error(client, "DELETE", f"{KEYS}/{kid}", 401, "unauthorized")
    expect_error(client, "DELETE", f"{KEYS}/{kid}", 401, "unauthorized", headers=keys["revoked"])


def test_revoke_key_needs_an_admin_key(client: TestClient, keys: Keys) -> None:
    kid = new_key(client, keys["admin"], role="device")["id"]
    for who in ("technician", "device"):
        expect_error(client, "DELETE", f"{KEYS}/{kid}", 403, "forbidden", headers=keys[who])


def test_revoke_unknown_key_is_404(client: TestClient, keys: Keys) -> None:
    for kid in ("k_0000000000000000", "nope"):
        expect_error(client, "DELETE", f"{KEYS}/{kid}", 404, "key_not_found", headers=keys["admin"])
    expect_error(
        client, "DELETE", f"{KEYS}/{'k' * 41}", 422, "validation_error", headers=keys["admin"]
    )


def test_revoked_key_is_refused(client: TestClient, keys: Keys, make_channel: Any) -> None:
    admin = keys["admin"]
    make_channel("site-a.p1")
    made = new_key(client, admin, role="device", prefixes=["site-a."])
    dev = auth(made["secret"])
    sample = {"samples": [{"x": 1.0, "y": 2.0}]}
    assert (
        client.post("/v1/channels/site-a.p1/samples", json=sample, headers=dev).status_code == 200
    )

    out = ok(client.delete(f"{KEYS}/{made['id']}", headers=admin))
    assert out["id"] == made["id"] and out["revoked_at"] is not None and "secret" not in out
    expect_error(
        client,
        "POST",
        "/v1/channels/site-a.p1/samples",
        401,
        "unauthorized",
        json=sample,
        headers=dev,
    )
    expect_error(
        client,
        "POST",
        "/v1/channels/site-a.p1/predict",
        401,
        "unauthorized",
        json={"x": [1.0]},
        headers=dev,
    )
    listed = next(
        it for it in ok(client.get(KEYS, headers=admin))["items"] if it["id"] == made["id"]
    )
    assert listed["revoked_at"] == out["revoked_at"]
    # revoking again changes nothing
    before = store_fingerprint(client)
    assert (
        ok(client.delete(f"{KEYS}/{made['id']}", headers=admin))["revoked_at"] == out["revoked_at"]
    )
    assert store_fingerprint(client) == before


# a device key limited to prefixes ----------------------------------------------------------
def test_device_key_posts_samples_only_under_its_prefixes(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel("site-a.p1")
    make_channel("site-b.p1")
    dev = auth(new_key(client, keys["admin"], role="device", prefixes=["site-a."])["secret"])
    sample = {"samples": [{"x": 1.0, "y": 2.0}]}
    assert (
        ok(client.post("/v1/channels/site-a.p1/samples", json=sample, headers=dev))["accepted"] == 1
    )
    assert (
        ok(client.post("/v1/channels/site-a.p1/predict", json={"x": [1.0]}, headers=dev))["version"]
        == 1
    )
    expect_error(
        client, "POST", "/v1/channels/site-b.p1/samples", 403, "forbidden", json=sample, headers=dev
    )
    expect_error(
        client,
        "POST",
        "/v1/channels/site-b.p1/predict",
        403,
        "forbidden",
        json={"x": [1.0]},
        headers=dev,
    )
    # a gateway batch touching a channel outside the prefixes stores nothing at all
    batch = {
        "samples": [
            {"channel": "site-a.p1", "x": 1.0, "y": 2.0},
            {"channel": "site-b.p1", "x": 1.0, "y": 2.0},
        ]
    }
    expect_error(client, "POST", "/v1/samples", 403, "forbidden", json=batch, headers=dev)
    assert (
        ok(client.post("/v1/samples", json={"samples": batch["samples"][:1]}, headers=dev))[
            "accepted"
        ]
        == 1
    )


def test_device_key_cannot_do_technician_or_admin_work(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel("site-a.p1")
    tech = keys["technician"]
    sid = ok(client.post("/v1/channels/site-a.p1/snapshots", headers=tech), 201)["id"]
    dev = auth(new_key(client, keys["admin"], role="device", prefixes=["site-a."])["secret"])
    base = "/v1/channels/site-a.p1"
    points = {"points": [{"x": 0.0, "y": 1.0}, {"x": 100.0, "y": 2.0}]}
    for method, url, body in [
        ("GET", f"{base}/curve", None),
        ("POST", f"{base}/calibrate", points),
        ("POST", f"{base}/rollback", {"snapshot": sid}),
        ("PATCH", base, {"drift": {"tolerance": 0.5}}),
        ("GET", base, None),
        ("GET", "/v1/channels", None),
        (
            "POST",
            "/v1/channels",
            {"id": "site-a.new", "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 1}],
             "output": {"unit": "V"}},
        ),
        ("GET", f"{base}/snapshots", None),
        ("POST", f"{base}/snapshots", None),
        ("GET", f"{base}/snapshots/{sid}", None),
        ("GET", f"{base}/events", None),
        ("GET", f"{base}/samples", None),
        ("GET", KEYS, None),
        ("POST", KEYS, {"role": "device", "prefixes": ["site-"]}),
        ("DELETE", f"{KEYS}/k_0000000000000000", None),
    ]:
        expect_error(client, method, url, 403, "forbidden", json=body, headers=dev)


# GET /healthz, /readyz, /metrics --------------------------------------------------------------
def test_healthz_and_readyz_need_no_key(client: TestClient) -> None:
    r = client.get("/healthz")
    assert r.status_code == 200 and r.json() == {"status": "ok"}
    r = client.get("/readyz")
    assert r.status_code == 200 and r.json() == {"status": "ready"}


def test_metrics_without_a_key_is_401(client: TestClient, keys: Keys) -> None:
    expect_error(client, "GET", "/metrics", 401, "unauthorized")
    expect_error(client, "GET", "/metrics", 401, "unauthorized", headers=keys["revoked"])


def test_metrics_needs_a_technician_key(client: TestClient, keys: Keys) -> None:
    expect_error(client, "GET", "/metrics", 403, "forbidden", headers=keys["device"])


def test_metrics_count_samples(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    samples = {"samples": [{"x": float(i), "y": 1.0 + 0.1 * i} for i in range(3)]}
    assert (
        ok(client.post("/v1/channels/site-a.p1/samples", json=samples, headers=keys["device"]))[
            "accepted"
        ]
        == 3
    )
    for who in ("technician", "admin"):
        r = client.get("/metrics", headers=keys[who])
        assert r.status_code == 200
        assert r.headers["content-type"].startswith("text/plain")
        assert 'curvekeeper_samples_total{outcome="accepted"} 3.0' in r.text
        assert "curvekeeper_http_requests_total" in r.text


def test_metrics_public_needs_no_key(settings: Settings) -> None:
    with TestClient(create_app(settings.with_(metrics_public=True))) as c:
        r = c.get("/metrics")
        assert r.status_code == 200, r.text
        assert "# TYPE curvekeeper_samples_total counter" in r.text
        # only /metrics is opened: the rest still needs a key
        assert c.get(KEYS).status_code == 401


# CURVEKEEPER_ADMIN_KEY -------------------------------------------------------------------------
def test_start_up_admin_key_works(client: TestClient, admin: Headers) -> None:
    items = ok(client.get(KEYS, headers=admin))["items"]
    (row,) = items
    assert row["role"] == "admin" and row["revoked_at"] is None
    assert admin_key_rows(client) == 1


def test_restart_keeps_exactly_one_admin_key(
    client: TestClient, settings: Settings, admin: Headers
) -> None:
    new_key(client, admin, role="technician")
    before = ok(client.get(KEYS, headers=admin))["items"]
    for _ in range(2):
        with TestClient(create_app(settings)) as again:
            assert admin_key_rows(again) == 1
            # the same keys (each restart's first use moves the admin key's last use on)
            assert _without_use(ok(again.get(KEYS, headers=admin))["items"]) == _without_use(before)
    assert admin_key_rows(client) == 1


def test_restart_refuses_an_admin_key_secret_that_was_revoked(
    client: TestClient, settings: Settings, admin: Headers
) -> None:
    other = auth(new_key(client, admin, role="admin")["secret"])
    kid = ok(client.get(KEYS, headers=other))["items"]
    start_up = next(k["id"] for k in kid if k["label"] == "admin key from CURVEKEEPER_ADMIN_KEY")
    ok(client.delete(f"{KEYS}/{start_up}", headers=other))
    assert client.get(KEYS, headers=admin).status_code == 401
    # starting again must not quietly bring the revoked secret back
    with pytest.raises(ValueError, match="revoked"), TestClient(create_app(settings)):
        pass
    assert client.get(KEYS, headers=admin).status_code == 401
    assert admin_key_rows(client) == 1


def _without_use(items: list[dict[str, Any]]) -> list[dict[str, Any]]:
    return [{k: v for k, v in it.items() if k != "last_used_at"} for it in items]
