"""The due watch (``service/curvekeeper/actions/duewatch.py``): ``calibration_due_soon`` and
``calibration_overdue`` written once per due date by the sweep, on the days
``core.conformity.due_state`` gives, cleared by a new due date, never for an archived
channel, and queued for a webhook that asks for them (the outbox).

The app runs on a clock the tests move; the service's own sweep is off and the tests call it."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from curvekeeper.actions import duewatch
from curvekeeper.actions.unit import Work
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.core.conformity import due_state
from fastapi.testclient import TestClient

from tests.api.helpers import Clock, Keys, ok

CH = "site-a.due"
T0 = datetime(2026, 6, 1, 8, 0, tzinfo=UTC)  # calibrations are dated by their "at", in the past
INTERVAL, WINDOW = 30, 7  # days: due on T0 + 30 d, due soon from 7 d before
POINTS = [{"x": x, "y": 3.0 + 0.5 * x} for x in (0.0, 25.0, 50.0, 75.0, 100.0)]


@pytest.fixture
def clock() -> Clock:
    return Clock(T0)


@pytest.fixture
def client(settings: Settings, clock: Clock) -> Iterator[TestClient]:
    with TestClient(create_app(settings.with_(stale_sweep_s=0.0), clock=clock)) as c:
        yield c


def sweep(client: TestClient) -> int:
    work: Work = client.app.state.ctx.work  # type: ignore[attr-defined]
    return duewatch.sweep_all(work)


def events(client: TestClient, keys: Keys, cid: str = CH) -> list[tuple[str, str]]:
    page = ok(client.get(f"/v1/channels/{cid}/events", headers=keys["technician"]))
    return [(e["kind"], e["details"]["due_on"]) for e in page["items"] if e["kind"].startswith("calibration_")
            and e["kind"] != "calibration"]


def calibrated(client: TestClient, keys: Keys, make_channel: Any, cid: str = CH) -> str:
    """A channel calibrated now (the clock's): its due date."""
    make_channel(cid, recalibration_interval_days=INTERVAL, due_soon_days=WINDOW)
    ok(client.post(f"/v1/channels/{cid}/calibrate", json={"points": POINTS, "at": T0.isoformat()},
                   headers=keys["technician"]))
    due = ok(client.get(f"/v1/channels/{cid}", headers=keys["technician"]))["due_on"]
    assert due == (T0.date() + timedelta(days=INTERVAL)).isoformat()
    return str(due)


def test_each_due_date_is_told_once_due_soon_then_overdue(client: TestClient, keys: Keys, make_channel: Any,
                                                          clock: Clock) -> None:
    due = calibrated(client, keys, make_channel)
    make_channel("site-a.never")  # never calibrated: no due date, never told
    due_day = datetime.fromisoformat(due).date()
    # the day before the window: nothing (core.conformity.due_state says ok)
    clock.now = T0 + timedelta(days=INTERVAL - WINDOW - 1)
    assert due_state(due_day, clock.now.date(), WINDOW) == "ok"
    assert sweep(client) == 0 and events(client, keys) == []
    # the window's first day: due soon, once however often the sweep runs
    clock.now = T0 + timedelta(days=INTERVAL - WINDOW)
    assert due_state(due_day, clock.now.date(), WINDOW) == "due_soon"
    assert sweep(client) == 1 and sweep(client) == 0
    assert events(client, keys) == [("calibration_due_soon", due)]
    # the due day itself is still due soon; the day after, overdue, once
    clock.now = T0 + timedelta(days=INTERVAL)
    assert sweep(client) == 0
    clock.now = T0 + timedelta(days=INTERVAL + 1)
    assert due_state(due_day, clock.now.date(), WINDOW) == "overdue"
    assert sweep(client) == 1 and sweep(client) == 0
    assert events(client, keys) == [("calibration_due_soon", due), ("calibration_overdue", due)]
    assert events(client, keys, "site-a.never") == []


def test_a_channel_first_seen_overdue_is_told_overdue_only(client: TestClient, keys: Keys, make_channel: Any,
                                                           clock: Clock) -> None:
    due = calibrated(client, keys, make_channel)
    clock.now = T0 + timedelta(days=INTERVAL + 40)
    assert sweep(client) == 1 and sweep(client) == 0
    assert events(client, keys) == [("calibration_overdue", due)]


def test_a_new_due_date_is_told_again(client: TestClient, keys: Keys, make_channel: Any, clock: Clock) -> None:
    first = calibrated(client, keys, make_channel)
    clock.now = T0 + timedelta(days=INTERVAL + 2)
    assert sweep(client) == 1
    # recalibrated now: due again in INTERVAL days, and told again when that comes
    ok(client.post(f"/v1/channels/{CH}/calibrate", json={"points": POINTS, "at": clock.now.isoformat()},
                   headers=keys["technician"]))
    assert sweep(client) == 0
    second = (clock.now.date() + timedelta(days=INTERVAL)).isoformat()
    clock.now += timedelta(days=INTERVAL + 1)
    assert sweep(client) == 1
    assert events(client, keys) == [("calibration_overdue", first), ("calibration_overdue", second)]


def test_an_archived_channel_is_not_told(client: TestClient, keys: Keys, make_channel: Any, clock: Clock,
                                         admin: dict[str, str]) -> None:
    calibrated(client, keys, make_channel)
    ok(client.post(f"/v1/channels/{CH}/archive", json={}, headers=admin))
    clock.now = T0 + timedelta(days=INTERVAL + 1)
    assert sweep(client) == 0 and events(client, keys) == []


def test_a_webhook_asking_for_them_gets_a_pending_delivery(client: TestClient, keys: Keys, make_channel: Any,
                                                           clock: Clock, admin: dict[str, str]) -> None:
    hook = ok(client.post("/v1/webhooks", json={"url": "http://127.0.0.1:9/hooks", "events": ["calibration_overdue"],
                                                "secret": "due-watch-secret-0001"}, headers=admin), 201)
    calibrated(client, keys, make_channel)
    clock.now = T0 + timedelta(days=INTERVAL - WINDOW)
    assert sweep(client) == 1  # due soon: not asked for
    assert ok(client.get(f"/v1/webhooks/{hook['id']}/deliveries", headers=admin))["items"] == []
    clock.now = T0 + timedelta(days=INTERVAL + 1)
    assert sweep(client) == 1
    [d] = ok(client.get(f"/v1/webhooks/{hook['id']}/deliveries", headers=admin))["items"]
    assert d["state"] == "pending" and d["event_id"] is not None
