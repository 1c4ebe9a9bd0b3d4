"""Samples/s into one channel over MQTT against HTTP, at the same batch sizes, on one
``curvekeeper serve --mqtt`` process (SQLite, durable commits) and the real broker.

HTTP: one client posts its bodies one after the other (each waits for its answer). MQTT: one
device publishes the same bodies at QoS 1 without waiting (as a device does; the broker
holds at most its in-flight window unacknowledged towards the service), and the time runs
until the service's last result arrives on the results topic; every result is checked to
be an answer, not an error.

    python -m tests.bench.mqtt_bench --size quick
"""

from __future__ import annotations

import json
import shutil
import tempfile
import threading
import time
import uuid
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import httpx
import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion

from .report import Table, figure, save, section_main
from .service_bench import AUTH, CHANNEL, Fleet, samples_body

#: samples per message -> messages per run, per size
PLANS: dict[str, dict[int, int]] = {
    "smoke": {1: 20, 100: 4},
    "quick": {1: 300, 10: 200, 100: 60, 1000: 8},
    "full": {1: 1000, 10: 600, 100: 200, 1000: 20},
}
BROKER = "mqtt://127.0.0.1:1883"


def broker_reachable(url: str = BROKER) -> bool:
    import socket

    parts = urlsplit(url)
    try:
        socket.create_connection((parts.hostname or "127.0.0.1", parts.port or 1883), timeout=2).close()
    except OSError:
        return False
    return True


class Device:
    """A publisher and a reader of the results topic, on the bench's own topic root."""

    def __init__(self, root: str) -> None:
        parts = urlsplit(BROKER)
        self.root = root
        self.results: list[dict[str, Any]] = []
        self.lock = threading.Lock()
        subscribed = threading.Event()
        self.client = paho.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-{uuid.uuid4().hex[:8]}",
                                  protocol=paho.MQTTv5)
        self.client.on_message = self._on_message
        self.client.on_subscribe = lambda *_: subscribed.set()
        self.client.max_queued_messages_set(0)
        self.client.connect(parts.hostname or "127.0.0.1", parts.port or 1883)
        self.client.loop_start()
        self.client.subscribe(f"{root}/results/+", qos=1)
        if not subscribed.wait(10):
            raise RuntimeError("no SUBACK from the broker")

    def _on_message(self, _c: paho.Client, _u: Any, msg: paho.MQTTMessage) -> None:
        with self.lock:
            self.results.append(json.loads(msg.payload))

    def count(self) -> int:
        with self.lock:
            return len(self.results)

    def publish_all(self, channel: str, bodies: list[bytes], timeout_s: float = 300.0) -> float:
        """Seconds from the first publish to the last result (every one an answer)."""
        before = self.count()
        t0 = time.perf_counter()
        for b in bodies:
            self.client.publish(f"{self.root}/samples/{channel}", b, qos=1)
        deadline = time.monotonic() + timeout_s
        while self.count() < before + len(bodies):
            if time.monotonic() > deadline:
                raise RuntimeError(f"{self.count() - before} results of {len(bodies)} in {timeout_s} s")
            time.sleep(0.001)
        elapsed = time.perf_counter() - t0
        with self.lock:
            errors = [r for r in self.results[before:] if "error" in r]
        if errors:
            raise RuntimeError(f"error results: {errors[:3]}")
        return elapsed

    def wait_served(self, timeout_s: float = 60.0) -> None:
        """Until the service answers (its subscription exists): a probe on no channel."""
        deadline = time.monotonic() + timeout_s
        while self.count() == 0:
            self.client.publish(f"{self.root}/samples/no.such.probe", b'{"samples": [{"x": 1, "y": 1}]}', qos=1)
            time.sleep(0.5)
            if time.monotonic() > deadline:
                raise RuntimeError("the service never answered over MQTT")
        time.sleep(0.5)
        with self.lock:
            self.results.clear()

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def run(size: str, out: Path) -> dict[str, Any]:
    if not broker_reachable():
        raise RuntimeError(f"no MQTT broker at {BROKER} (.ci/run starts Mosquitto)")
    tmp = Path(tempfile.mkdtemp(prefix="ck-mqtt-bench-"))
    fleet = Fleet(tmp)
    root = f"ckbench-{uuid.uuid4().hex[:10]}/curvekeeper/v1"
    try:
        env = {"CURVEKEEPER_MQTT_TOPIC_ROOT": root, "CURVEKEEPER_MQTT_CLIENT_ID": root.split("/")[0],
               "CURVEKEEPER_MQTT_SESSION_EXPIRY_S": "60", "CURVEKEEPER_LOG_LEVEL": "warning"}
        server = fleet.spawn("mqtt", ["curvekeeper.cli", "serve", "--db", f"sqlite:///{tmp / 'bench.db'}",
                                      "--mqtt", BROKER], "/readyz", env)
        fleet.wait_ready()
        device = Device(root)
        try:
            device.wait_served()
            return _run(PLANS[size], server.url, device, out)
        finally:
            device.close()
    finally:
        fleet.stop()
        shutil.rmtree(tmp, ignore_errors=True)


def _run(plan: dict[int, int], url: str, device: Device, out: Path) -> dict[str, Any]:
    table = Table("Ingest into one channel: samples/s over HTTP and over MQTT, same batches",
                  ["samples per message", "messages", "HTTP samples/s", "MQTT samples/s", "MQTT / HTTP"])
    rates: dict[int, tuple[float, float]] = {}
    seq = 0
    with httpx.Client(base_url=url, headers=AUTH, timeout=120) as c:
        for proto in ("http", "mqtt"):  # a channel of each, fresh
            r = c.post("/v1/channels", json={"id": f"bench.{proto}", **CHANNEL})
            r.raise_for_status()
        for batch, n in plan.items():
            http_bodies = [samples_body(batch, seq + k * batch) for k in range(n)]
            mqtt_bodies = [samples_body(batch, seq + k * batch) for k in range(n)]
            seq += n * batch
            t0 = time.perf_counter()
            for b in http_bodies:
                c.post("/v1/channels/bench.http/samples", content=b).raise_for_status()
            http_s = time.perf_counter() - t0
            mqtt_s = device.publish_all("bench.mqtt", mqtt_bodies)
            rates[batch] = (batch * n / http_s, batch * n / mqtt_s)
            table.add(batch, n, rates[batch][0], rates[batch][1], rates[batch][1] / rates[batch][0])
        stored = {p: c.get(f"/v1/channels/bench.{p}").json()["n_samples"] for p in ("http", "mqtt")}
    if stored["http"] != seq or stored["mqtt"] != seq:
        raise RuntimeError(f"stored {stored}, sent {seq} on each")
    table.show()
    fig, ax = figure("Ingest into one channel: HTTP and MQTT", "samples per message", "samples/s", log=True)
    xs = list(rates)
    ax.plot(xs, [rates[b][0] for b in xs], "o-", label="HTTP, one client, sequential requests")
    ax.plot(xs, [rates[b][1] for b in xs], "s--", label="MQTT QoS 1, one device, pipelined")
    ax.legend()
    headline = {f"mqtt_samples_per_s_batch{b}": rates[b][1] for b in rates}
    headline |= {f"http_samples_per_s_batch{b}": rates[b][0] for b in rates}
    headline |= {"samples_each": seq}
    return {"tables": [table.to_json()], "figures": [save(fig, out, "mqtt_ingest_batch")], "headline": headline}


if __name__ == "__main__":
    section_main(run, __doc__)
