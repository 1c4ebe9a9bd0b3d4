"""Errors: domain errors carry a code and no HTTP status; the API maps each class to its
status in one place, and a stored state that cannot be restored is the server's fault
(500 ``state_damaged``), never blamed on the client with a 422; it stays that channel's
problem: the fleet's list shows it as damaged and every other channel answers as before."""

from __future__ import annotations

import inspect
import json
from typing import Any

import pytest
from curvekeeper import errors
from curvekeeper.api.errors import status_of
from curvekeeper.store.tables import Channel, ChannelState
from fastapi.testclient import TestClient
from sqlalchemy import text as sql_text
from sqlalchemy import update

from tests.api.helpers import expect_error, stored_state

EXPECTED = {
    errors.Unauthorized: 401, errors.Forbidden: 403, errors.NotFound: 404, errors.ChannelNotFound: 404,
    errors.SnapshotNotFound: 404, errors.KeyNotFound: 404, errors.CalibrationNotFound: 404,
    errors.WebhookNotFound: 404, errors.DeliveryNotFound: 404,
    errors.AlreadySuperseded: 409, errors.Conflict: 409, errors.ChannelExists: 409,
    errors.ImmutableField: 409, errors.NotCalibrated: 409, errors.NothingToAcknowledge: 409,
    errors.ServiceUnchanged: 409, errors.ChannelArchived: 409, errors.AlreadyArchived: 409, errors.NotArchived: 409,
    errors.PayloadTooLarge: 413, errors.InvalidRequest: 422,
    errors.InvalidConfig: 422, errors.ReferenceNotFound: 404, errors.ReferenceExists: 409,
    errors.ReferenceRetired: 409, errors.ReferenceOverdue: 409, errors.ReferenceRequired: 422,
    errors.StoreBusy: 503, errors.NotReady: 503, errors.StateDamaged: 500, errors.ServiceError: 500,
}


def test_domain_errors_carry_no_http_status() -> None:
    classes = [c for _, c in inspect.getmembers(errors, inspect.isclass)
               if issubclass(c, errors.ServiceError) and c.__module__ == errors.__name__]
    assert set(classes) <= set(EXPECTED), f"map these in EXPECTED: {set(classes) - set(EXPECTED)}"
    for cls in classes:
        assert "status" not in vars(cls), f"{cls.__name__} carries an HTTP status"
        assert cls.code and cls.code.islower()


@pytest.mark.parametrize("cls", list(EXPECTED), ids=lambda c: c.__name__)
def test_the_api_maps_each_domain_error_to_its_status(cls: type[errors.ServiceError]) -> None:
    assert status_of(cls("x")) == EXPECTED[cls]


def _damage(client: TestClient, channel_id: str, state: Any) -> None:
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=True) as repo:
        pk = repo.session.scalars(Channel.__table__.select().with_only_columns(Channel.pk)
                                  .where(Channel.id == channel_id)).one()
        repo.session.execute(update(ChannelState).where(ChannelState.channel_pk == pk)
                             .values(model_state=state, version=ChannelState.version + 1))




DAMAGES = {
    "unknown-format": lambda s: {"format": 999},
    "damaged-fields": lambda s: {"weights": "not numbers"},
    "not-an-object": lambda s: [],
    # finite numbers, but three weights where the basis has two
    "wrong-shaped-weights": lambda s: {**s, "weights": [*s["weights"], 1.0]},
}


@pytest.mark.parametrize("damage", list(DAMAGES))
def test_a_damaged_stored_state_is_that_channels_server_error(client: TestClient, admin: dict[str, str],
                                                              make_channel: Any, damage: str) -> None:
    for cid in ("site-a.d1", "site-a.d2", "site-a.d3"):
        make_channel(cid)
    bench = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 26.0}, {"x": 100.0, "y": 51.2}]}
    assert client.post("/v1/channels/site-a.d2/calibrate", json=bench, headers=admin).status_code == 200
    healthy = {cid: client.get(f"/v1/channels/{cid}", headers=admin).json() for cid in ("site-a.d2", "site-a.d3")}
    _damage(client, "site-a.d2", DAMAGES[damage](stored_state(client, "site-a.d2")))
    # the damaged channel's own routes: 500 state_damaged naming the way out, nothing stored
    for method, url, body in [
        ("GET", "/v1/channels/site-a.d2", None),
        ("GET", "/v1/channels/site-a.d2/curve", None),
        ("POST", "/v1/channels/site-a.d2/samples", {"samples": [{"x": 1.0, "y": 2.0}]}),
        ("POST", "/v1/channels/site-a.d2/predict", {"x": [1.0]}),
    ]:
        err = expect_error(client, method, url, 500, "state_damaged", json=body, headers=admin)
        assert "site-a.d2" in err["message"] and "POST /v1/channels/site-a.d2/rollback" in err["message"], err
    # the fleet's list answers, with the damaged channel in its place
    listed = client.get("/v1/channels", headers=admin)
    assert listed.status_code == 200, listed.text
    items = listed.json()["items"]
    assert [i["id"] for i in items] == ["site-a.d1", "site-a.d2", "site-a.d3"]
    damaged = items[1]
    assert damaged["state"] == "damaged" and damaged["error"]["code"] == "state_damaged"
    assert "POST /v1/channels/site-a.d2/rollback" in damaged["error"]["message"]
    assert damaged["version"] == healthy["site-a.d2"]["version"] + 1  # the damage's write
    assert items[2] == healthy["site-a.d3"] and "state" not in items[0]
    # the state filter: damaged lists it alone; the others leave it out
    only = client.get("/v1/channels", params={"state": "damaged"}, headers=admin).json()
    assert [i["id"] for i in only["items"]] == ["site-a.d2"] and only["next_cursor"] is None
    ok = client.get("/v1/channels", params={"state": "ok"}, headers=admin).json()
    assert [i["id"] for i in ok["items"]] == ["site-a.d1", "site-a.d3"]
    # one a page: the damaged channel takes its page like any other
    pages, cursor = [], None
    while True:
        page = client.get("/v1/channels", params={"limit": 1, **({"cursor": cursor} if cursor else {})},
                          headers=admin).json()
        pages.append([(i["id"], i.get("state")) for i in page["items"]])
        if (cursor := page["next_cursor"]) is None:
            break
    assert pages == [[("site-a.d1", None)], [("site-a.d2", "damaged")], [("site-a.d3", None)]]
    ok_pages = client.get("/v1/channels", params={"state": "ok", "limit": 1}, headers=admin).json()
    assert [i["id"] for i in ok_pages["items"]] == ["site-a.d1"]
    after = client.get("/v1/channels", params={"state": "ok", "limit": 1, "cursor": ok_pages["next_cursor"]},
                       headers=admin).json()
    assert [i["id"] for i in after["items"]] == ["site-a.d3"] and after["next_cursor"] is None
    # every other channel learns and answers as before
    r = client.post("/v1/channels/site-a.d3/samples", json={"samples": [{"x": 1.0, "y": 2.0}]}, headers=admin)
    assert r.status_code == 200, r.text
    assert client.get("/v1/channels/site-a.d1", headers=admin).json() == items[0]
    assert client.post("/v1/channels/site-a.d3/predict", json={"x": [1.0]}, headers=admin).status_code == 200


def test_a_stored_state_with_infinity_is_damaged(client: TestClient, admin: dict[str, str], make_channel: Any,
                                                 settings: Any) -> None:
    """JSON has no Infinity, but SQLite keeps whatever text it is given (PostgreSQL's json type
    refuses it): a weight written as Infinity is a damaged state, not a number."""
    if not settings.database_url.startswith("sqlite"):
        pytest.skip("PostgreSQL refuses Infinity in a json column")
    make_channel("site-a.d1")
    make_channel("site-a.d2")
    text_state = json.dumps(stored_state(client, "site-a.d1")).replace('"weights": [0.0,', '"weights": [Infinity,')
    assert "Infinity" in text_state
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=True) as repo:
        repo.session.execute(sql_text("UPDATE channel_state SET model_state = :s, version = version + 1 "
                                      "WHERE channel_pk = (SELECT pk FROM channel WHERE id = 'site-a.d1')"),
                             {"s": text_state})
    expect_error(client, "GET", "/v1/channels/site-a.d1", 500, "state_damaged", headers=admin)
    items = client.get("/v1/channels", headers=admin).json()["items"]
    assert [(i["id"], i.get("state")) for i in items] == [("site-a.d1", "damaged"), ("site-a.d2", None)]
