"""The audit trail (``GET /v1/audit``, ``service/curvekeeper/actions/audit.py``), and secrets kept out
of every answer and every log record.

Every change a technician or admin makes (channel create, patch, calibrate, snapshot,
rollback, key create and revoke) is an event with the acting key's id; the audit route
lists them across channels, key events (which have no channel) included, with a
one-line summary, paged like every list and filtered by ``kind`` and ``key_id``.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from typing import Any

import pytest
from curvekeeper.actions import audit
from curvekeeper.auth import hash_secret
from curvekeeper.store.tables import Event
from fastapi.testclient import TestClient

from tests.conftest import ADMIN_SECRET, LINEAR, auth, store_fingerprint

Headers = dict[str, str]
Keys = dict[str, Headers]

AUDIT = "/v1/audit"
CH = "site-a.p1"
BASE = f"/v1/channels/{CH}"
ITEM_FIELDS = {"id", "kind", "channel", "key_id", "at", "version", "summary", "details"}
POINTS = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 2.0}, {"x": 100.0, "y": 3.1}], "label": "bench check"}


# helpers ---------------------------------------------------------------------------
def expect_error(client: TestClient, url: str, status: int, code: str, *, headers: Headers | None = None,
                 params: dict[str, Any] | None = None) -> None:
    before = store_fingerprint(client)
    r = client.get(url, headers=headers or {}, params=params)
    assert r.status_code == status, r.text[:800]
    err = r.json()["error"]
    assert err["code"] == code and err["message"], err
    assert store_fingerprint(client) == before


def ok(r: Any, status: int = 200) -> Any:
    assert r.status_code == status, r.text[:800]
    return r.json()


def secret_of(headers: Headers) -> str:
    return headers["Authorization"].removeprefix("Bearer ")


def admin_key_id(client: TestClient, admin: Headers) -> str:
    items = ok(client.get("/v1/keys", headers=admin))["items"]
    return next(str(k["id"]) for k in items if k["label"] == "admin key from CURVEKEEPER_ADMIN_KEY")


def audit_pages(client: TestClient, admin: Headers, limit: int = 1000, **filters: str) -> tuple[list[Any], list[str]]:
    """Every audit item (following next_cursor) and the raw text of each page."""
    items: list[Any] = []
    texts: list[str] = []
    cursor: str | None = None
    while True:
        params: dict[str, Any] = {"limit": limit, **filters, **({"cursor": cursor} if cursor else {})}
        r = client.get(AUDIT, params=params, headers=admin)
        body = ok(r)
        texts.append(r.text)
        items.extend(body["items"])
        cursor = body["next_cursor"]
        if cursor is None:
            return items, texts


def make_changes(client: TestClient, admin: Headers) -> dict[str, Any]:
    """A technician key made by the admin creates, patches, calibrates, snapshots and rolls
    back a channel; the admin makes a device key and revokes it."""
    tech = ok(client.post("/v1/keys", json={"role": "technician", "label": "bench laptop"}, headers=admin), 201)
    th = auth(tech["secret"])
    ok(client.post("/v1/channels", json={"id": CH, **LINEAR}, headers=th), 201)
    ok(client.patch(BASE, json={"drift": {"tolerance": 0.5}, "description": "rack 2"}, headers=th))
    cal = ok(client.post(f"{BASE}/calibrate", json=POINTS, headers=th))
    snap = ok(client.post(f"{BASE}/snapshots", json={"label": "before trial"}, headers=th), 201)
    ok(client.post(f"{BASE}/rollback", json={"snapshot": snap["id"]}, headers=th))
    dev = ok(client.post("/v1/keys", json={"role": "device", "prefixes": ["site-a."]}, headers=admin), 201)
    ok(client.delete(f"/v1/keys/{dev['id']}", headers=admin))
    return {"tech": tech, "device": dev, "snapshot": snap["id"], "calibration": cal,
            "admin_id": admin_key_id(client, admin)}


# GET /v1/audit: who may read it, bad input ------------------------------------------------
def test_audit_without_a_valid_key_is_401(client: TestClient, keys: Keys) -> None:
    expect_error(client, AUDIT, 401, "unauthorized")
    expect_error(client, AUDIT, 401, "unauthorized", headers=auth("ck_wrong-0123456789abcdef"))
    expect_error(client, AUDIT, 401, "unauthorized", headers=keys["revoked"])


def test_audit_needs_an_admin_key(client: TestClient, keys: Keys) -> None:
    for who in ("technician", "device", "other_device"):
        expect_error(client, AUDIT, 403, "forbidden", headers=keys[who])


def test_audit_bad_paging_or_filters_are_422(client: TestClient, keys: Keys) -> None:
    admin = keys["admin"]
    for params in ({"limit": 0}, {"limit": 1001}, {"kind": "k" * 33}, {"key_id": "k" * 41}):
        expect_error(client, AUDIT, 422, "validation_error", headers=admin, params=params)
    expect_error(client, AUDIT, 422, "invalid_request", headers=admin, params={"cursor": "%%%"})


# what it lists ------------------------------------------------------------------------
def test_every_change_shows_up_with_the_acting_key_and_a_summary(client: TestClient, admin: Headers) -> None:
    done = make_changes(client, admin)
    tech_id, dev_id, admin_id = done["tech"]["id"], done["device"]["id"], done["admin_id"]
    items, _ = audit_pages(client, admin)
    for it in items:
        assert set(it) == ITEM_FIELDS, it
        assert isinstance(it["summary"], str) and it["summary"], it
    # the service made the admin key itself at start-up (CURVEKEEPER_ADMIN_KEY): no key acted
    start_up = items.pop(0)
    assert (start_up["kind"], start_up["key_id"]) == ("key_created", None)
    assert start_up["details"]["by"] == "CURVEKEEPER_ADMIN_KEY at start-up"
    assert [(it["kind"], it["key_id"], it["channel"]) for it in items] == [
        ("key_created", admin_id, None),
        ("channel_created", tech_id, CH),
        ("settings_changed", tech_id, CH),
        ("calibration", tech_id, CH),
        ("snapshot", tech_id, CH),
        ("rollback", tech_id, CH),
        ("key_created", admin_id, None),
        ("key_revoked", admin_id, None),
    ]
    ids = [it["id"] for it in items]
    assert ids == sorted(ids) and len(set(ids)) == len(ids)
    by_kind = {it["kind"]: it for it in items}  # the last of each kind
    made_tech, made_dev = items[0], by_kind["key_created"]
    assert made_tech["details"]["id"] == tech_id and made_tech["details"]["role"] == "technician"
    assert tech_id in made_tech["summary"] and "technician" in made_tech["summary"]
    assert dev_id in made_dev["summary"] and "site-a." in made_dev["summary"]
    assert dev_id in by_kind["key_revoked"]["summary"] and by_kind["key_revoked"]["details"] == {"id": dev_id}
    assert CH in by_kind["channel_created"]["summary"]
    assert "drift" in by_kind["settings_changed"]["summary"]
    assert "description" in by_kind["settings_changed"]["summary"]
    assert "bench check" in by_kind["calibration"]["summary"]
    assert by_kind["calibration"]["details"]["snapshot_after"] == done["calibration"]["snapshot_after"]
    assert str(done["snapshot"]) in by_kind["snapshot"]["summary"]
    assert str(done["snapshot"]) in by_kind["rollback"]["summary"]
    # key events have no channel and no version; a channel's events count its versions up
    assert all(it["version"] is None for it in items if it["channel"] is None)
    versions = [it["version"] for it in items if it["channel"] == CH]
    assert versions == [0, 1, 2, 2, 3]
    # a channel's part of the trail is what its own events route shows
    events = ok(client.get(f"{BASE}/events", headers=admin))["items"]
    assert [{k: e[k] for k in ("id", "kind", "key_id", "at", "version", "details")} for e in events] == [
        {k: it[k] for k in ("id", "kind", "key_id", "at", "version", "details")} for it in items if it["channel"] == CH]


def test_filters_by_kind_and_key_and_pages(client: TestClient, admin: Headers) -> None:
    done = make_changes(client, admin)
    tech_id, admin_id = done["tech"]["id"], done["admin_id"]
    everything, _ = audit_pages(client, admin)

    made, _ = audit_pages(client, admin, kind="key_created")
    assert [it["details"]["id"] for it in made] == [admin_id, tech_id, done["device"]["id"]]
    assert made[0]["key_id"] is None  # the admin key itself, made at start-up
    assert all(it["channel"] is None and it["key_id"] == admin_id for it in made[1:])

    by_tech, _ = audit_pages(client, admin, key_id=tech_id)
    assert [it["kind"] for it in by_tech] == ["channel_created", "settings_changed", "calibration", "snapshot",
                                               "rollback"]
    both, _ = audit_pages(client, admin, key_id=admin_id, kind="key_revoked")
    assert [it["kind"] for it in both] == ["key_revoked"]
    assert audit_pages(client, admin, kind="no_such_kind")[0] == []
    assert audit_pages(client, admin, key_id="k_0000000000000000")[0] == []

    # paged one at a time, or two with a filter: the same items, none twice
    assert audit_pages(client, admin, limit=1)[0] == everything
    assert audit_pages(client, admin, limit=2, key_id=tech_id)[0] == by_tech


def test_device_samples_and_their_events_name_the_device_key(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    """Events the learner raises (here a guard refusing a step) carry the key that posted
    the samples that raised them."""
    admin = keys["admin"]
    make_channel(CH, learner={"kind": "sgd", "schedule": {"kind": "constant", "eta0": 5.0}})
    dev = ok(client.post("/v1/keys", json={"role": "device", "prefixes": ["site-a."]}, headers=admin), 201)
    samples = {"samples": [{"x": 100.0, "y": 2.0}]}
    ok(client.post(f"{BASE}/samples", json=samples, headers=auth(dev["secret"])))
    guards, _ = audit_pages(client, admin, key_id=dev["id"])
    assert guards and all(it["kind"] == "guard" and it["channel"] == CH for it in guards), guards
    assert "step size halved" in guards[0]["summary"] and CH in guards[0]["summary"]


@pytest.mark.parametrize(("kind", "details", "expected"), [
    ("drift_alarm", {"sample_seq": 41, "from": "warning", "statistic": 9.5},
     "drift alarm on site-a.p1 at sample 41 (was warning)"),
    ("out_of_tolerance", {"max_curve_change": 0.7}, "out of tolerance on site-a.p1"),
])
def test_summaries_of_events_the_learner_raises(kind: str, details: dict[str, Any], expected: str) -> None:
    assert audit.summary(Event(kind=kind, details=details), CH) == expected


def test_a_detail_named_secret_is_never_shown(client: TestClient, admin: Headers, make_channel: Any) -> None:
    """No event stores a secret today; should one ever carry such a field, the trail hides it."""
    make_channel(CH)
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=True) as repo:
        repo.insert_events([{"channel_pk": None, "kind": "key_created", "key_id": "k_x",
                             "details": {"id": "k_y", "secret": "ck_leak", "nested": [{"Secret_Hash": "abc"}]}}])
    items, texts = audit_pages(client, admin, key_id="k_x")
    assert items[0]["details"] == {"id": "k_y", "nested": [{}]}
    assert "ck_leak" not in texts[0] and "abc" not in texts[0]


# secrets never in an answer ---------------------------------------------------------------
def test_no_secret_or_secret_hash_in_any_audit_or_event_answer(client: TestClient, keys: Keys) -> None:
    admin = keys["admin"]
    done = make_changes(client, admin)
    secrets = [ADMIN_SECRET, done["tech"]["secret"], done["device"]["secret"], *map(secret_of, keys.values())]
    forbidden = secrets + [hash_secret(s) for s in secrets]
    texts: list[str] = []
    for filters in ({}, {"kind": "key_created"}, {"kind": "key_revoked"}, {"key_id": done["admin_id"]}):
        texts.extend(audit_pages(client, admin, limit=3, **filters)[1])
    texts.append(client.get(f"{BASE}/events", headers=admin).text)
    texts.append(client.get(f"{BASE}/events", headers=keys["technician"]).text)
    texts.append(client.get("/v1/keys", headers=admin).text)
    assert len(texts) > 6
    for text in texts:
        assert '"secret' not in text, text
        for s in forbidden:
            assert s not in text


# secrets never in a log record --------------------------------------------------------------
@pytest.fixture
def every_log(caplog: pytest.LogCaptureFixture) -> Iterator[pytest.LogCaptureFixture]:
    """caplog at DEBUG for every logger there is (the service's, uvicorn's, fastapi's,
    starlette's, SQLAlchemy's with its SQL and parameters, httpx's ...), including
    loggers that do not pass records up to the root."""
    names = {"curvekeeper", "curvekeeper.api", "uvicorn", "uvicorn.error", "uvicorn.access", "fastapi",
             "starlette", "sqlalchemy", "sqlalchemy.engine", "sqlalchemy.engine.Engine", "sqlalchemy.pool",
             "sqlalchemy.orm", "httpx", "httpcore", "anyio", "asyncio", "psycopg",
             *logging.root.manager.loggerDict}
    loggers = [logging.getLogger(n) for n in sorted(names)]
    saved = [(lg, lg.level, lg.disabled) for lg in loggers]
    caplog.set_level(logging.DEBUG)  # the root logger and caplog's handler
    attached = []
    for lg in loggers:
        lg.setLevel(logging.DEBUG)
        lg.disabled = False
        if not lg.propagate:
            lg.addHandler(caplog.handler)
            attached.append(lg)
    try:
        yield caplog
    finally:
        for lg in attached:
            lg.removeHandler(caplog.handler)
        for lg, level, disabled in saved:
            lg.setLevel(level)
            lg.disabled = disabled


def record_text(r: logging.LogRecord) -> str:
    """Everything a handler could write from a record: message, arguments, extras, traceback."""
    parts = [r.getMessage(), repr(r.args), repr(r.__dict__)]
    if r.exc_info:
        parts.append(logging.Formatter().formatException(r.exc_info))
    return "\n".join(parts)


def test_no_secret_or_authorization_header_in_any_log_record(client: TestClient, admin: Headers,
                                                           every_log: pytest.LogCaptureFixture) -> None:
    wrong = "ck_wrong-secret-that-is-not-a-key-0123456789"
    # create keys
    tech = ok(client.post("/v1/keys", json={"role": "technician"}, headers=admin), 201)
    dev = ok(client.post("/v1/keys", json={"role": "device", "prefixes": ["site-a."]}, headers=admin), 201)
    th, dh = auth(tech["secret"]), auth(dev["secret"])
    # authenticate: from the store, then from the key cache; a bad body after a good key
    ok(client.post("/v1/channels", json={"id": CH, **LINEAR}, headers=th), 201)
    for _ in range(2):
        ok(client.post(f"{BASE}/samples", json={"samples": [{"x": 1.0, "y": 2.0}]}, headers=dh))
        ok(client.get("/v1/channels", headers=th))
    assert client.post("/v1/channels", json={"id": "Bad id"}, headers=th).status_code == 422
    assert client.post("/v1/channels", content=b"{", headers={**th, "content-type": "application/json"}
                       ).status_code == 400
    # fail to authenticate: a wrong secret, a good secret in the wrong scheme, a bad body with a wrong key
    for headers in (auth(wrong), {"Authorization": f"Basic {tech['secret']}"}, {"Authorization": tech["secret"]}):
        assert client.get("/v1/channels", headers=headers).status_code == 401
        assert client.post("/v1/channels", json={"id": "Bad id"}, headers=headers).status_code == 401
    # revoke, and the revoked key refused
    ok(client.delete(f"/v1/keys/{dev['id']}", headers=admin))
    assert client.post(f"{BASE}/samples", json={"samples": [{"x": 1.0, "y": 2.0}]}, headers=dh).status_code == 401

    records = every_log.records
    assert any(r.name.startswith("sqlalchemy") for r in records), "the capture saw no SQL: it does not work"
    values = [ADMIN_SECRET, tech["secret"], dev["secret"], wrong]
    values += [h["Authorization"] for h in (admin, th, dh, auth(wrong))]
    for r in records:
        text = record_text(r)
        for v in values:
            assert v not in text, f"{r.name} logged a secret: {r.getMessage()[:300]}"
    for v in values:
        assert v not in every_log.text
