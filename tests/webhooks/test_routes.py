"""Webhook routes (admin only) and the address policy (``curvekeeper.webhooks.policy``).

Refused addresses are checked as a pure function (with a resolver the test gives) and
through the create route, which stores nothing; nothing here ever sends a request."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import pytest
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.webhooks import KINDS, policy
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error, ok

HOOKS = "/v1/webhooks"
SECRET = "receiver-secret-0123456789"
GOOD = {"url": "http://127.0.0.1:9/hook", "events": ["drift_alarm", "rollback"], "secret": SECRET}


def resolver(*addrs: str) -> policy.Resolver:
    def resolve(host: str) -> Iterable[str]:
        return addrs
    return resolve


# the policy, as a pure function --------------------------------------------------------------
@pytest.mark.parametrize("url, addrs", [
    ("http://169.254.169.254/latest/meta-data/", ()),
    ("http://169.254.10.1:8080/", ()),
    ("http://[fe80::1]/", ()),
    ("http://[fd00:ec2::254]/", ()),
    ("http://[::ffff:169.254.169.254]/", ()),
    ("http://metadata.google.internal/computeMetadata/v1/", ("10.1.2.3",)),
    ("http://METADATA.GOOGLE.INTERNAL./", ("10.1.2.3",)),
    ("http://relay.example.org/", ("10.0.0.8", "169.254.169.254")),  # one bad address is enough
    ("http://relay.example.org/", ("fe80::2%eth0",)),
    ("ftp://relay.example.org/", ("10.0.0.8",)),
    ("http:///no-host", ()),
])
def test_refused_addresses(url: str, addrs: tuple[str, ...]) -> None:
    with pytest.raises(policy.Refused):
        policy.check(url, allow_link_local=False, resolver=resolver(*addrs))


@pytest.mark.parametrize("url, addrs", [
    ("http://127.0.0.1:8080/", ()),
    ("http://[::1]/", ()),
    ("https://relay.example.org/", ("10.0.0.8",)),
    ("https://relay.example.org/", ("192.168.1.20", "fd12:3456::1")),
    ("http://169.254.1.1/", ()),  # allowed only with the setting (below)
])
def test_allowed_addresses(url: str, addrs: tuple[str, ...]) -> None:
    allow = url.startswith("http://169.254")
    policy.check(url, allow_link_local=allow, resolver=resolver(*addrs))


def test_a_name_that_does_not_resolve_is_refused() -> None:
    def fail(host: str) -> Iterable[str]:
        raise OSError("no such host")
    with pytest.raises(policy.Refused, match="does not resolve"):
        policy.check("http://nowhere.invalid/", allow_link_local=False, resolver=fail)


# the routes ------------------------------------------------------------------------------------
def test_webhooks_are_for_admins_only(client: TestClient, keys: Keys) -> None:
    hid = ok(client.post(HOOKS, json=GOOD, headers=keys["admin"]), 201)["id"]
    for role in ("technician", "device"):
        h = keys[role]
        expect_error(client, "POST", HOOKS, 403, "forbidden", json=GOOD, headers=h)
        expect_error(client, "GET", HOOKS, 403, "forbidden", headers=h)
        expect_error(client, "DELETE", f"{HOOKS}/{hid}", 403, "forbidden", headers=h)
        expect_error(client, "POST", f"{HOOKS}/{hid}/test", 403, "forbidden", headers=h)
        expect_error(client, "GET", f"{HOOKS}/{hid}/deliveries", 403, "forbidden", headers=h)
        expect_error(client, "POST", f"{HOOKS}/{hid}/deliveries/1/resend", 403, "forbidden", headers=h)
    expect_error(client, "POST", HOOKS, 401, "unauthorized", json=GOOD)
    expect_error(client, "GET", HOOKS, 401, "unauthorized")


def test_create_list_delete(client: TestClient, keys: Keys) -> None:
    adm = keys["admin"]
    made = ok(client.post(HOOKS, json=GOOD, headers=adm), 201)
    assert made["secret"] == SECRET and made["url"] == GOOD["url"] and made["events"] == GOOD["events"]
    listed = ok(client.get(HOOKS, headers=adm))["items"]
    assert [h["id"] for h in listed] == [made["id"]]
    assert "secret" not in listed[0]  # shown once
    assert ok(client.delete(f"{HOOKS}/{made['id']}", headers=adm))["id"] == made["id"]
    assert ok(client.get(HOOKS, headers=adm))["items"] == []
    expect_error(client, "DELETE", f"{HOOKS}/{made['id']}", 404, "webhook_not_found", headers=adm)


BAD_BODIES: list[tuple[dict[str, Any], str]] = [
    ({**GOOD, "events": ["drift_alarm", "no_such_kind"]}, "invalid_request"),
    ({**GOOD, "events": []}, "validation_error"),
    ({**GOOD, "events": "drift_alarm"}, "validation_error"),
    ({**GOOD, "secret": "short"}, "validation_error"),
    ({**GOOD, "secret": "has spaces in it 0123456789"}, "validation_error"),
    ({**GOOD, "extra": 1}, "validation_error"),
    ({k: v for k, v in GOOD.items() if k != "secret"}, "validation_error"),
    ({**GOOD, "url": "ftp://127.0.0.1/hook"}, "invalid_request"),
    ({**GOOD, "url": "http://169.254.169.254/latest/meta-data/"}, "invalid_request"),
    ({**GOOD, "url": "http://169.254.3.4:8080/hook"}, "invalid_request"),
    ({**GOOD, "url": "http://[fe80::1]/hook"}, "invalid_request"),
    ({**GOOD, "url": "http://[fd00:ec2::254]/hook"}, "invalid_request"),
    ({**GOOD, "url": "http://metadata.google.internal/hook"}, "invalid_request"),
]


@pytest.mark.parametrize("body, code", BAD_BODIES)
def test_bad_bodies_store_nothing(client: TestClient, keys: Keys, body: dict[str, Any], code: str) -> None:
    expect_error(client, "POST", HOOKS, 422, code, json=body, headers=keys["admin"])


def test_bad_paths_and_queries(client: TestClient, keys: Keys) -> None:
    adm = keys["admin"]
    hid = ok(client.post(HOOKS, json=GOOD, headers=adm), 201)["id"]
    expect_error(client, "POST", f"{HOOKS}/wh_nope/test", 404, "webhook_not_found", headers=adm)
    expect_error(client, "GET", f"{HOOKS}/wh_nope/deliveries", 404, "webhook_not_found", headers=adm)
    expect_error(client, "GET", f"{HOOKS}/{hid}/deliveries", 422, "invalid_request", headers=adm,
                 params={"state": "lost"})
    expect_error(client, "GET", f"{HOOKS}/{hid}/deliveries", 422, "invalid_request", headers=adm,
                 params={"cursor": "not-a-cursor"})
    expect_error(client, "POST", f"{HOOKS}/{hid}/deliveries/999/resend", 404, "delivery_not_found", headers=adm)
    expect_error(client, "POST", f"{HOOKS}/{hid}/deliveries/0/resend", 422, "validation_error", headers=adm)


def test_link_local_is_allowed_by_the_setting(settings: Settings, keys: Keys) -> None:
    with TestClient(create_app(settings.with_(webhook_allow_link_local=True, webhook_dispatch_s=0.0))) as c:
        body = {**GOOD, "url": "http://169.254.3.4:8080/hook"}
        assert ok(c.post(HOOKS, json=body, headers=keys["admin"]), 201)["url"] == body["url"]


def test_every_deliverable_kind_is_listed_once() -> None:
    assert len(set(KINDS)) == len(KINDS)
    assert {"drift_alarm", "drift_warning", "calibration", "rollback", "acknowledged", "service_changed",
            "stale", "archived", "out_of_tolerance"} <= set(KINDS)
