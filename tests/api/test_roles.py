"""Who may call what: one table of every route of the HTTP contract (v1) and, for each
kind of caller, the status it must get; checked on both backends.

Roles: ``admin`` > ``technician`` > ``device``. A device key (here limited to ``site-a.``)
may only post samples (one channel or a gateway batch) and predict on channels under its
prefixes; a technician may do everything but manage keys (and read the audit trail).

Each row's request is one that succeeds for a caller allowed to make it, so a 2xx proves
the role check passed and a 401/403 that it refused: a channel to create gets a new id
in every cell, a key to revoke is made fresh for every cell. A refused request must also
leave the store exactly as it was.
"""

from __future__ import annotations

import itertools
from typing import Any, NamedTuple

from fastapi.testclient import TestClient

from tests.conftest import LINEAR, auth, store_fingerprint

Headers = dict[str, str]
Keys = dict[str, Headers]

CH = "site-a.p1"  # under the device key's prefix, not the other device key's
BAD_SECRET = "ck_no-such-key-0123456789abcdefghij"

CALLERS = ("none", "bad_key", "revoked", "device", "other_device", "technician", "admin")


class Row(NamedTuple):
    method: str
    path: str  # the route's template: {channel_id}, {snapshot_id}, {kid} are filled in per cell
    body: Any  # "{new}" becomes a fresh channel id, "{snapshot_id}" the snapshot's id
    none: int
    bad_key: int
    revoked: int
    device: int
    other_device: int
    technician: int
    admin: int
    alarm: bool = False  # each cell first puts the channel in service with a drift alarm (see raise_alarm)
    archived: bool | None = None  # each cell first archives the channel (True) or makes it live (False)


NEW_CHANNEL = {"id": "{new}", **LINEAR}
SAMPLES = {"samples": [{"x": 50.0, "y": 3.0}]}
GATEWAY = {"samples": [{"channel": CH, "x": 50.0, "y": 3.0}]}
POINTS = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 2.0}, {"x": 100.0, "y": 3.0}]}
REF = "matrix.ref"
NEW_REFERENCE = {"id": "{new}", "unit": "kPa", "expanded_uncertainty": 0.02, "certificate": "CERT-M",
                 "calibrated_on": "2026-01-05", "due_on": "2036-01-05"}

HOOK = {"url": "http://127.0.0.1:9/hook", "events": ["drift_alarm"], "secret": "matrix-secret-0123456789"}

C = "/v1/channels/{channel_id}"
MATRIX = [
    #   method    path                            body                        none bad  rev  dev  dev2 tech admin
    Row("GET",    "/healthz",                     None,                       200, 200, 200, 200, 200, 200, 200),
    Row("GET",    "/readyz",                      None,                       200, 200, 200, 200, 200, 200, 200),
    Row("GET",    "/metrics",                     None,                       401, 401, 401, 403, 403, 200, 200),
    Row("POST",   "/v1/channels",                 NEW_CHANNEL,                401, 401, 401, 403, 403, 201, 201),
    Row("GET",    "/v1/channels",                 None,                       401, 401, 401, 403, 403, 200, 200),
    Row("GET",    C,                              None,                       401, 401, 401, 403, 403, 200, 200),
    Row("PATCH",  C,                              {"drift": {"tolerance": 0.5}},
                                                                              401, 401, 401, 403, 403, 200, 200),
    Row("POST",   f"{C}/samples",                 SAMPLES,                    401, 401, 401, 200, 403, 200, 200),
    Row("GET",    f"{C}/samples",                 None,                       401, 401, 401, 403, 403, 200, 200),
    Row("POST",   "/v1/samples",                  GATEWAY,                    401, 401, 401, 200, 403, 200, 200),
    Row("POST",   f"{C}/predict",                 {"x": [50.0]},              401, 401, 401, 200, 403, 200, 200),
    Row("GET",    f"{C}/curve",                   None,                       401, 401, 401, 403, 403, 200, 200),
    Row("POST",   f"{C}/calibrate",               POINTS,                     401, 401, 401, 403, 403, 200, 200),
    Row("GET",    f"{C}/calibrations",            None,                       401, 401, 401, 403, 403, 200, 200),
    Row("GET",    f"{C}/calibrations/{{record_id}}", None,                    401, 401, 401, 403, 403, 200, 200),
    Row("GET",    f"{C}/calibrations/{{record_id}}/report.pdf", None,         401, 401, 401, 403, 403, 200, 200),
    Row("GET",    f"{C}/snapshots",               None,                       401, 401, 401, 403, 403, 200, 200),
    Row("POST",   f"{C}/snapshots",               {"label": "matrix"},        401, 401, 401, 403, 403, 201, 201),
    Row("GET",    f"{C}/snapshots/{{snapshot_id}}", None,                     401, 401, 401, 403, 403, 200, 200),
    Row("POST",   f"{C}/rollback",                {"snapshot": "{snapshot_id}"},
                                                                              401, 401, 401, 403, 403, 200, 200),
    Row("GET",    f"{C}/events",                  None,                       401, 401, 401, 403, 403, 200, 200),
    Row("POST",   f"{C}/acknowledge",             {"note": "matrix"},         401, 401, 401, 403, 403, 200, 200, True),
    Row("POST",   f"{C}/service",                 {"state": "out_of_service", "note": "matrix"},
                                                                              401, 401, 401, 403, 403, 200, 200, True),
    Row("POST",   "/v1/keys",                     {"role": "device", "prefixes": ["site-a."]},
                                                                              401, 401, 401, 403, 403, 403, 201),
    Row("GET",    "/v1/keys",                     None,                       401, 401, 401, 403, 403, 403, 200),
    Row("DELETE", "/v1/keys/{kid}",               None,                       401, 401, 401, 403, 403, 403, 200),
    Row("POST",   "/v1/webhooks",                 HOOK,                       401, 401, 401, 403, 403, 403, 201),
    Row("GET",    "/v1/webhooks",                 None,                       401, 401, 401, 403, 403, 403, 200),
    Row("DELETE", "/v1/webhooks/{wid}",           None,                       401, 401, 401, 403, 403, 403, 200),
    Row("POST",   "/v1/webhooks/{wid}/test",      None,                       401, 401, 401, 403, 403, 403, 202),
    Row("GET",    "/v1/webhooks/{wid}/deliveries", None,                      401, 401, 401, 403, 403, 403, 200),
    Row("POST",   "/v1/webhooks/{wid}/deliveries/{did}/resend", None,         401, 401, 401, 403, 403, 403, 202),
    Row("GET",    "/v1/audit",                    None,                       401, 401, 401, 403, 403, 403, 200),
    Row("POST",   f"{C}/archive",                 {"note": "matrix"},         401, 401, 401, 403, 403, 200, 200,
        archived=False),
    Row("POST",   f"{C}/unarchive",               {},                         401, 401, 401, 403, 403, 200, 200,
        archived=True),
    Row("POST",   "/v1/references",               NEW_REFERENCE,              401, 401, 401, 403, 403, 201, 201),
    Row("GET",    "/v1/references",               None,                       401, 401, 401, 200, 200, 200, 200),
    Row("GET",    "/v1/references/{reference_id}", None,                      401, 401, 401, 200, 200, 200, 200),
    Row("PATCH",  "/v1/references/{reference_id}", {"note": "matrix"},        401, 401, 401, 403, 403, 200, 200),
]  # fmt: skip

CODES = {401: "unauthorized", 403: "forbidden"}


def fill(value: Any, names: dict[str, Any]) -> Any:
    """The body with each "{name}" string replaced by its value (a number stays a number)."""
    if isinstance(value, dict):
        return {k: fill(v, names) for k, v in value.items()}
    if isinstance(value, list):
        return [fill(v, names) for v in value]
    if isinstance(value, str) and value.startswith("{") and value.endswith("}") and value[1:-1] in names:
        return names[value[1:-1]]
    return value


def app_routes(client: TestClient) -> set[tuple[str, str]]:
    """(method, path template) of every route the app serves, from its OpenAPI document."""
    paths: dict[str, dict[str, Any]] = client.app.openapi()["paths"]  # type: ignore[attr-defined]
    return {(method.upper(), path) for path, ops in paths.items() for method in ops}


def raise_alarm(client: TestClient, keys: Keys) -> None:
    """A calibration (which puts the channel back in service) on the line y = 1 + 0.02 x,
    then samples 1.0 off it: the drift watch raises its alarm."""
    h = keys["technician"]
    r = client.post(f"/v1/channels/{CH}/calibrate", json=POINTS, headers=h)
    assert r.status_code == 200, r.text
    r = client.post(f"/v1/channels/{CH}/samples", headers=h,
                    json={"samples": [{"x": 10.0 * (i % 11), "y": 2.0 + 0.02 * 10.0 * (i % 11)} for i in range(30)]})
    assert r.status_code == 200 and r.json()["drift"]["state"] == "alarm", r.text


def set_archived(client: TestClient, keys: Keys, archived: bool) -> None:
    """Archive the channel, or make it live, unless it is so already."""
    r = client.post(f"/v1/channels/{CH}/{'archive' if archived else 'unarchive'}", json={}, headers=keys["admin"])
    assert r.status_code == 200 or r.json()["error"]["code"] == ("already_archived" if archived else "not_archived")


def test_the_table_lists_every_route_of_the_app(client: TestClient) -> None:
    routes = app_routes(client)
    table = {(row.method, row.path) for row in MATRIX}
    assert len(table) == len(MATRIX), "a route is in the table twice"
    assert routes == table, f"missing from the table: {routes - table}; not in the app: {table - routes}"


def test_each_caller_gets_the_status_the_table_says(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel(CH)
    r = client.post(f"/v1/channels/{CH}/snapshots", headers=keys["technician"])
    assert r.status_code == 201, r.text
    snapshot_id = r.json()["id"]
    r = client.post("/v1/references", json={**NEW_REFERENCE, "id": REF}, headers=keys["technician"])
    assert r.status_code == 201, r.text
    r = client.post(f"/v1/channels/{CH}/calibrate", json=POINTS, headers=keys["technician"])
    assert r.status_code == 200, r.text
    record_id = r.json()["calibration"]
    headers: dict[str, Headers] = {"none": {}, "bad_key": auth(BAD_SECRET)}
    headers.update({name: keys[name] for name in CALLERS[2:]})
    fresh = itertools.count(1)
    wrong: list[str] = []
    for row in MATRIX:
        for caller in CALLERS:
            want: int = getattr(row, caller)
            names: dict[str, Any] = {"channel_id": CH, "snapshot_id": snapshot_id, "record_id": record_id,
                                     "new": f"site-a.new{next(fresh)}", "reference_id": REF}
            if "{kid}" in row.path:
                made = client.post("/v1/keys", json={"role": "device"}, headers=keys["admin"])
                assert made.status_code == 201, made.text
                names["kid"] = made.json()["id"]
            if "{wid}" in row.path:
                made = client.post("/v1/webhooks", json=HOOK, headers=keys["admin"])
                assert made.status_code == 201, made.text
                names["wid"] = made.json()["id"]
                queued = client.post(f"/v1/webhooks/{names['wid']}/test", headers=keys["admin"])
                assert queued.status_code == 202, queued.text
                names["did"] = queued.json()["id"]
            if row.alarm:
                raise_alarm(client, keys)
            if row.archived is not None:
                set_archived(client, keys, row.archived)
            before = store_fingerprint(client) if want >= 400 else None
            r = client.request(row.method, row.path.format(**names), json=fill(row.body, names),
                               headers=headers[caller])
            cell = f"{row.method} {row.path} as {caller}"
            if r.status_code != want:
                wrong.append(f"{cell}: want {want}, got {r.status_code} {r.text[:200]}")
            elif want >= 400:
                err = r.json()["error"]
                if err["code"] != CODES[want] or not err["message"]:
                    wrong.append(f"{cell}: error body {err}")
                if store_fingerprint(client) != before:
                    wrong.append(f"{cell}: refused, yet the store changed")
    assert not wrong, "\n".join(wrong)
