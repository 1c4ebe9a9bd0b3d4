"""Events out over MQTT (``service/curvekeeper/mqtt/feed.py``): the event log after a cursor
in the store, published in order, at least once, by one leaseholder at a time; first with a
publisher of the test's own (both databases), then through the real broker."""

from __future__ import annotations

import json
import threading
import time
import uuid
from collections.abc import Iterator
from datetime import datetime, timedelta
from typing import Any
from urllib.parse import urlsplit

import paho.mqtt.client as paho
import pytest
from curvekeeper.actions.unit import Work
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.mqtt.feed import EventFeed
from curvekeeper.webhooks import KINDS
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, ok
from tests.mqtt.broker import broker_url, unique_root

POINTS = [{"x": x, "y": 3.0 + 0.5 * x} for x in (0.0, 25.0, 50.0, 75.0, 100.0)]


class Sink:
    """Publishes into a list; ``refuse`` makes the broker "not acknowledge" from that topic on."""

    def __init__(self) -> None:
        self.got: list[tuple[str, dict[str, Any]]] = []
        self.refuse: set[int] = set()

    def __call__(self, topic: str, raw: bytes) -> bool:
        body = json.loads(raw)
        if body["id"] in self.refuse:
            return False
        self.got.append((topic, body))
        return True


def work(client: TestClient) -> Work:
    return client.app.state.ctx.work  # type: ignore[attr-defined,no-any-return]


def calibrate(client: TestClient, keys: Keys, cid: str) -> None:
    ok(client.post(f"/v1/channels/{cid}/calibrate", json={"points": POINTS}, headers=keys["technician"]))


def logged(client: TestClient, keys: Keys, cid: str) -> list[dict[str, Any]]:
    """The channel's events of the deliverable kinds, as its events route lists them."""
    items = ok(client.get(f"/v1/channels/{cid}/events", headers=keys["technician"]))["items"]
    return [e for e in items if e["kind"] in KINDS]


def test_the_feed_publishes_the_alert_events_after_its_start_in_order(client: TestClient, keys: Keys,
                                                                      make_channel: Any) -> None:
    make_channel("site-a.f1")
    calibrate(client, keys, "site-a.f1")  # before the feed exists: history, not published
    sink = Sink()
    feed = EventFeed(work(client), sink, root="plant/v1")
    feed.prepare()
    assert feed.run_once() == 0 and sink.got == []
    make_channel("site-a.f2")  # channel_created: not an alert kind
    for cid in ("site-a.f2", "site-a.f1"):
        calibrate(client, keys, cid)
    assert feed.run_once() == 2 and feed.run_once() == 0
    wanted = [logged(client, keys, cid)[-1] for cid in ("site-a.f2", "site-a.f1")]  # the newest of each
    assert [t for t, _ in sink.got] == ["plant/v1/events/site-a.f2", "plant/v1/events/site-a.f1"]
    assert [(b["id"], b["kind"], b["channel"]) for _, b in sink.got] == [
        (e["id"], "calibration", cid) for e, cid in zip(wanted, ("site-a.f2", "site-a.f1"), strict=True)]
    assert all(b["details"] == e["details"] for (_, b), e in zip(sink.got, wanted, strict=True))


def test_an_unacknowledged_publish_is_tried_again_and_nothing_after_it_goes_first(client: TestClient, keys: Keys,
                                                                                 make_channel: Any) -> None:
    make_channel("site-a.f1")
    sink = Sink()
    feed = EventFeed(work(client), sink)
    feed.prepare()
    for _ in range(3):
        calibrate(client, keys, "site-a.f1")
    ids = [e["id"] for e in logged(client, keys, "site-a.f1")]
    sink.refuse = {ids[1]}
    assert feed.run_once() == 1  # the first; stops at the second
    assert feed.run_once() == 0  # still refused: nothing after it either
    sink.refuse = set()
    assert feed.run_once() == 2
    assert [b["id"] for _, b in sink.got] == ids


def test_one_process_publishes_at_a_time_and_another_takes_over_when_its_lease_runs_out(
        client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.f1")
    a_sink, b_sink = Sink(), Sink()
    a = EventFeed(work(client), a_sink, owner="host-a:1", lease_s=60)
    b = EventFeed(work(client), b_sink, owner="host-b:2", lease_s=60)
    a.prepare()
    b.prepare()  # the cursor exists once
    calibrate(client, keys, "site-a.f1")
    now = work(client).clock()
    assert a.run_once(now) == 1
    calibrate(client, keys, "site-a.f1")
    assert b.run_once(now + timedelta(seconds=30)) == 0  # a's lease holds
    assert b.run_once(now + timedelta(seconds=61)) == 1  # a is gone: b goes on from a's cursor
    assert a.run_once(now + timedelta(seconds=62)) == 0  # b holds it now
    ids = [e["id"] for e in logged(client, keys, "site-a.f1")]
    assert [b["id"] for _, b in a_sink.got + b_sink.got] == ids


@pytest.fixture
def served(settings: Settings) -> Iterator[tuple[TestClient, str]]:
    """The app with MQTT on, a topic root of its own, and the feed's passes every 0.05 s."""
    root = unique_root()
    app = create_app(settings.with_(mqtt_url=broker_url(), mqtt_topic_root=root, mqtt_events_s=0.05,
                                    mqtt_client_id=f"ck-{uuid.uuid4().hex[:10]}", mqtt_session_expiry_s=60))
    with TestClient(app) as c:
        yield c, root


def test_events_arrive_on_the_broker_as_the_events_route_lists_them(served: tuple[TestClient, str], keys: Keys,
                                                                    admin: dict[str, str]) -> None:
    client, root = served
    got: list[tuple[str, dict[str, Any]]] = []
    subscribed = threading.Event()
    sub = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id=f"ev-{uuid.uuid4().hex[:8]}", protocol=paho.MQTTv5)
    sub.on_message = lambda _c, _u, m: got.append((m.topic, json.loads(m.payload)))
    sub.on_subscribe = lambda *_: subscribed.set()
    parts = urlsplit(broker_url())
    sub.connect(parts.hostname or "127.0.0.1", parts.port or 1883)
    sub.loop_start()
    try:
        sub.subscribe(f"{root}/events/+", qos=1)
        assert subscribed.wait(10)
        body = {"id": "site-a.bus", "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
                "output": {"unit": "kPa"}}
        ok(client.post("/v1/channels", json=body, headers=admin), 201)
        calibrate(client, keys, "site-a.bus")
        ok(client.post("/v1/channels/site-a.bus/archive", json={}, headers=admin))
        deadline = time.monotonic() + 30
        while len(got) < 2 and time.monotonic() < deadline:
            time.sleep(0.02)
        listed = logged(client, keys, "site-a.bus")
        assert [e["kind"] for e in listed] == ["calibration", "archived"]
        def same_time(body: dict[str, Any]) -> dict[str, Any]:  # "Z" or "+00:00": one instant
            return {**body, "at": datetime.fromisoformat(body["at"].replace("Z", "+00:00"))}

        assert [(t, same_time(b)) for t, b in got] == [
            (f"{root}/events/site-a.bus", same_time({**e, "channel": "site-a.bus"})) for e in listed]
        metrics = client.get("/metrics", headers=admin).text
        assert "curvekeeper_mqtt_events_published_total 2.0" in metrics
    finally:
        sub.disconnect()
        sub.loop_stop()
