"""Errors: domain errors carry a code and no HTTP status; the API maps each class to its
status in one place, and a stored state that cannot be restored is the server's fault
(500 ``stored_state_damaged``), never blamed on the client with a 422."""

from __future__ import annotations

import inspect
from typing import Any

import pytest
from curvekeeper import errors
from curvekeeper.api.errors import status_of
from curvekeeper.store.tables import Channel, ChannelState
from fastapi.testclient import TestClient
from sqlalchemy import update

from tests.api.helpers import assert_error
from tests.conftest import store_fingerprint

EXPECTED = {
    errors.Unauthorized: 401, errors.Forbidden: 403, errors.NotFound: 404, errors.ChannelNotFound: 404,
    errors.SnapshotNotFound: 404, errors.KeyNotFound: 404, errors.Conflict: 409, errors.ChannelExists: 409,
    errors.ImmutableField: 409, errors.PayloadTooLarge: 413, errors.InvalidRequest: 422, errors.InvalidConfig: 422,
    errors.StoreBusy: 503, errors.NotReady: 503, errors.StoredStateDamaged: 500, errors.ServiceError: 500,
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


@pytest.mark.parametrize("state", [{"format": 999}, {"weights": "not numbers"}, []],
                         ids=["unknown-format", "damaged-fields", "not-an-object"])
def test_a_damaged_stored_state_is_a_server_error(client: TestClient, admin: dict[str, str],
                                                   make_channel: Any, state: Any) -> None:
    make_channel("site-a.d1")
    make_channel("site-a.d2")
    _damage(client, "site-a.d1", state)
    before = store_fingerprint(client)
    for method, url, body in [
        ("GET", "/v1/channels/site-a.d1", None),
        ("POST", "/v1/channels/site-a.d1/samples", {"samples": [{"x": 1.0, "y": 2.0}]}),
        ("POST", "/v1/channels/site-a.d1/predict", {"x": [1.0]}),
    ]:
        r = client.request(method, url, json=body, headers=admin)
        err = assert_error(r, 500, "stored_state_damaged")
        assert "state" in err["message"]
    assert store_fingerprint(client) == before, "a request on a damaged state changed the store"
    # the other channel is untouched and still answers
    assert client.get("/v1/channels/site-a.d2", headers=admin).status_code == 200
