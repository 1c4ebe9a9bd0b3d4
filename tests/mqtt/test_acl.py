"""deploy/mosquitto.acl and deploy/mosquitto.conf in a Mosquitto of the test's own (the
snippet in the conf.d of a main configuration like Debian's; a free loopback port, a
password file made by mosquitto_passwd; the TLS listener and Debian's paths left out):
anonymous clients are refused, a device publishes only on its own channel's samples topic
and reads only its own results, and the service's user reads the samples and writes
results, nothing else. The service's processes share the samples as a group; a device
that joins that group (the ACL file cannot stop it) takes a share that is lost."""

from __future__ import annotations

import getpass
import shutil
import socket
import subprocess
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
import pytest
from paho.mqtt.enums import CallbackAPIVersion

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
# lines of the snippet that name the production listeners, certificates and paths
REPLACED = ("listener", "certfile", "keyfile", "password_file", "acl_file")
PASSWORD = "test-password"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[int]:
    if not (shutil.which("mosquitto") and shutil.which("mosquitto_passwd")):
        pytest.skip("Mosquitto is not installed (Debian's mosquitto package)")
    passwd = tmp_path / "passwd"
    for user in ("curvekeeper", "room.a", "room.b"):
        subprocess.run(["mosquitto_passwd", "-b", *([] if passwd.exists() else ["-c"]), str(passwd), user, PASSWORD],
                       check=True, capture_output=True)
    kept = [line for line in (DEPLOY / "mosquitto.conf").read_text().splitlines()
            if line.strip() and not line.startswith("#") and line.split()[0] not in REPLACED]
    port = free_port()
    (tmp_path / "conf.d").mkdir()
    (tmp_path / "conf.d" / "curvekeeper.conf").write_text("\n".join([
        f"listener {port} 127.0.0.1", *kept, f"password_file {passwd}", f"acl_file {DEPLOY / 'mosquitto.acl'}", ""]))
    conf = tmp_path / "mosquitto.conf"
    # the snippet in conf.d/ of a main configuration like Debian's (which names the persistence
    # location: the snippet may not name another)
    conf.write_text("\n".join(["persistence true", f"persistence_location {tmp_path}/",
                               f"include_dir {tmp_path / 'conf.d'}",
                               # started as root, Mosquitto would drop to its own user, who cannot
                               # read the test's files
                               f"user {getpass.getuser()}", ""]))
    log = tmp_path / "mosquitto.log"
    out = log.open("wb")
    proc = subprocess.Popen(["mosquitto", "-c", str(conf)], stdout=out, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    pytest.fail(f"mosquitto did not start with the deploy config: {log.read_text()}")
                time.sleep(0.05)
        yield port
    finally:
        proc.terminate()
        proc.wait(timeout=10)
        out.close()


class Peer:
    """A client logged in as ``user``; what it receives, in order."""

    def __init__(self, port: int, user: str | None) -> None:
        self.got: list[tuple[str, bytes]] = []
        self.lock = threading.Lock()
        self.connected = threading.Event()
        self.reason: Any = None
        self.client = paho.Client(CallbackAPIVersion.VERSION2, client_id=f"{user}-{uuid.uuid4().hex[:6]}",
                                  protocol=paho.MQTTv5)
        if user is not None:
            self.client.username_pw_set(user, PASSWORD)
        self.client.on_connect = self._on_connect
        self.client.on_message = self._on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()

    def _on_connect(self, _c: paho.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        self.reason = reason
        self.connected.set()

    def _on_message(self, _c: paho.Client, _u: Any, msg: paho.MQTTMessage) -> None:
        with self.lock:
            self.got.append((msg.topic, bytes(msg.payload)))

    def subscribe(self, topic: str) -> None:
        assert self.connected.wait(10) and not self.reason.is_failure, self.reason
        self.client.subscribe(topic, qos=1)
        time.sleep(0.2)  # the SUBACK (a denied subscription is granted and then delivers nothing)

    def publish(self, topic: str, payload: bytes) -> None:
        self.client.publish(topic, payload, qos=1).wait_for_publish(timeout=10)

    def until(self, payload: bytes, timeout: float = 10.0) -> list[bytes]:
        """What arrived up to and including ``payload`` (fails when it does not come)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self.lock:
                got = [p for _, p in self.got]
            if payload in got:
                return got[:got.index(payload) + 1]
            time.sleep(0.02)
        pytest.fail(f"{payload!r} never arrived; got {got}")

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def test_anonymous_clients_are_refused(broker: int) -> None:
    anon = Peer(broker, None)
    try:
        assert anon.connected.wait(10)
        assert anon.reason.is_failure
    finally:
        anon.close()


def test_each_device_reaches_only_its_own_channel_and_the_service_only_its_topics(broker: int) -> None:
    service, a, b = Peer(broker, "curvekeeper"), Peer(broker, "room.a"), Peer(broker, "room.b")
    try:
        service.subscribe("curvekeeper/v1/samples/+")
        a.subscribe("curvekeeper/v1/results/+")  # granted only where the ACL allows: room.a's own
        b.subscribe("curvekeeper/v1/samples/+")  # a device may not read samples at all
        a.publish("curvekeeper/v1/samples/room.b", b"a posing as b")  # refused
        a.publish("curvekeeper/v1/samples/room.a", b"a's own")
        assert service.until(b"a's own") == [b"a's own"]
        service.publish("curvekeeper/v1/results/room.b", b"for b")
        service.publish("curvekeeper/v1/results/room.a", b"for a")
        assert a.until(b"for a") == [b"for a"]  # b's result never reaches a
        service.publish("curvekeeper/v1/samples/room.a", b"the service posing as a")  # refused
        b.publish("curvekeeper/v1/samples/room.b", b"b's own")
        assert service.until(b"b's own") == [b"a's own", b"b's own"]
        assert b.got == []
    finally:
        for p in (service, a, b):
            p.close()



def shared_round(broker: int, service_group: str, device_group: str) -> tuple[list[bytes], list[bytes]]:
    """Two service processes subscribed as ``service_group``, a device as ``device_group``;
    the device publishes s0..s5: what the two processes got between them, and the device."""
    one, two, a = Peer(broker, "curvekeeper"), Peer(broker, "curvekeeper"), Peer(broker, "room.a")
    try:
        one.subscribe(f"$share/{service_group}/curvekeeper/v1/samples/+")
        two.subscribe(f"$share/{service_group}/curvekeeper/v1/samples/+")
        a.subscribe(f"$share/{device_group}/curvekeeper/v1/samples/+")
        for i in range(6):
            a.publish("curvekeeper/v1/samples/room.a", f"s{i}".encode())
        a.publish("curvekeeper/v1/samples/room.a", b"end")
        time.sleep(0.5)
        assert one.got and two.got, "one member took every message"
        return sorted(p for _, p in one.got + two.got), [p for _, p in a.got]
    finally:
        for p in (one, two, a):
            p.close()


def test_the_services_processes_share_the_samples_each_once(broker: int) -> None:
    service, device = shared_round(broker, "ck-7f3a9c", "curvekeeper")  # the device guesses the default name
    assert service == sorted([b"end", *(f"s{i}".encode() for i in range(6))])
    assert device == []  # its own group's copies are refused by the ACL


def test_a_device_that_joins_the_services_group_takes_a_share_that_is_lost(broker: int) -> None:
    """Why docs/decisions/mqtt-scaling.md asks for a group name devices cannot guess:
    Mosquitto's ACL file checks reads when a message is delivered, not subscriptions, so a
    device may join the group; its turn of the round robin is then refused, and the message
    goes to no one."""
    service, device = shared_round(broker, "curvekeeper", "curvekeeper")
    assert device == []
    assert len(service) < 7, "every message reached the service: the broker now guards shared groups"
