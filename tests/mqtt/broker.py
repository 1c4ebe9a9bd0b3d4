"""The real broker for tests: its URL (CURVEKEEPER_TEST_MQTT_URL, default the local
Mosquitto), a skip with the reason when none answers, topics and client ids unique to each
test, a publisher that waits for the broker's PUBACK, and a collector of result messages."""

from __future__ import annotations

import json
import os
import socket
import threading
import time
import uuid
from typing import Any
from urllib.parse import urlsplit

import paho.mqtt.client as paho
import pytest

URL = os.environ.get("CURVEKEEPER_TEST_MQTT_URL", "mqtt://127.0.0.1:1883")


def broker_url() -> str:
    """The broker's URL, or a skip saying none answers there."""
    parts = urlsplit(URL)
    try:
        socket.create_connection((parts.hostname or "127.0.0.1", parts.port or 1883), timeout=2).close()
    except OSError as exc:
        pytest.skip(f"no MQTT broker at {URL} ({exc}); .ci/run starts Mosquitto, or set CURVEKEEPER_TEST_MQTT_URL")
    return URL


def unique_root() -> str:
    """A topic root of this test's own (``{root}/samples/...``), so parallel runs never meet."""
    return f"cktest-{uuid.uuid4().hex[:12]}/curvekeeper/v1"


def service_env(root: str) -> dict[str, str]:
    """What a served process needs to subscribe on ``root`` with a client id of its own."""
    return {"CURVEKEEPER_MQTT_URL": broker_url(), "CURVEKEEPER_MQTT_TOPIC_ROOT": root,
            "CURVEKEEPER_MQTT_CLIENT_ID": f"ck-{root.split('/')[0]}", "CURVEKEEPER_MQTT_SESSION_EXPIRY_S": "600"}


def _client(name: str) -> paho.Client:
    parts = urlsplit(broker_url())
    c = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id=f"{name}-{uuid.uuid4().hex[:8]}",
                    protocol=paho.MQTTv5)
    c.connect(parts.hostname or "127.0.0.1", parts.port or 1883)
    c.loop_start()
    return c


class Publisher:
    """Publishes samples bodies at QoS 1; ``send`` returns once the broker has the message."""

    def __init__(self, root: str) -> None:
        self.root = root
        self.client = _client("pub")

    def send(self, channel: str, payload: bytes | str | dict[str, Any]) -> None:
        data = json.dumps(payload) if isinstance(payload, dict) else payload
        info = self.client.publish(f"{self.root}/samples/{channel}", data, qos=1)
        info.wait_for_publish(timeout=30)
        assert info.is_published(), "the broker did not acknowledge a publish within 30 s"

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


class Results:
    """Every message on ``{root}/results/+``, as (channel, body), in arrival order."""

    def __init__(self, root: str) -> None:
        self.root = root
        self.items: list[tuple[str, dict[str, Any]]] = []
        self._lock = threading.Lock()
        self._subscribed = threading.Event()
        self.client = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id=f"res-{uuid.uuid4().hex[:8]}",
                                  protocol=paho.MQTTv5)
        self.client.on_message = self._on_message
        self.client.on_subscribe = lambda *_: self._subscribed.set()
        parts = urlsplit(broker_url())
        self.client.connect(parts.hostname or "127.0.0.1", parts.port or 1883)
        self.client.loop_start()
        self.client.subscribe(f"{root}/results/+", qos=1)
        assert self._subscribed.wait(10), "no SUBACK for the results topic"

    def _on_message(self, _c: paho.Client, _u: Any, msg: paho.MQTTMessage) -> None:
        with self._lock:
            self.items.append((msg.topic.rsplit("/", 1)[1], json.loads(msg.payload)))

    def snapshot(self) -> list[tuple[str, dict[str, Any]]]:
        with self._lock:
            return list(self.items)

    def wait(self, n: int, timeout: float = 60.0) -> list[tuple[str, dict[str, Any]]]:
        """At least ``n`` results (fails after ``timeout`` s without them)."""
        deadline = time.monotonic() + timeout
        while len(self.snapshot()) < n:
            if time.monotonic() > deadline:
                pytest.fail(f"{len(self.snapshot())} results of {n} after {timeout} s: {self.snapshot()[-3:]}")
            time.sleep(0.02)
        return self.snapshot()

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def wait_subscribed(pub: Publisher, results: Results, timeout: float = 60.0) -> None:
    """Until the service answers on the results topic: then its subscription (and its
    persistent session) exist. The probe names no channel that exists: an error result."""
    deadline = time.monotonic() + timeout
    before = len(results.snapshot())
    while True:
        pub.send("no.such.probe", {"samples": [{"x": 1.0, "y": 1.0}]})
        t = time.monotonic() + 1.0
        while time.monotonic() < t:
            if any(ch == "no.such.probe" for ch, _ in results.snapshot()[before:]):
                return
            time.sleep(0.02)
        if time.monotonic() > deadline:
            pytest.fail("the service never answered on the results topic")
