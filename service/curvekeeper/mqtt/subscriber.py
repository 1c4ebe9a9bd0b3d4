"""The MQTT side: a paho-mqtt client on a persistent session (QoS 1, a fixed client id,
``clean_start`` false, a session expiry), its network loop in paho's thread, and one worker
thread that learns the messages in the order they arrived.

Several processes share the samples through an MQTT 5 shared subscription
(``$share/<group>/<root>/samples/+``, when a group is set): the broker gives each message
to one member of the group. Each process has its own client id, so its own session
(docs/decisions/mqtt-scaling.md).

Acknowledgement is manual (paho's ``manual_ack``): a message's PUBACK goes to the broker
only after its reply is known, that is after its samples are committed (or it is refused
for good: a bad payload is acknowledged, with its error on the results topic, so it is not
delivered forever). A transient fault (the store busy or unreachable) leaves the message
unacknowledged; the worker then waits ``RETRY_S`` (doubling, up to ``RETRY_MAX_S``), drops
the messages it holds and reconnects on the same session, and the broker delivers every
unacknowledged message of that session again, the failed one first. A crash does the
same: what was not acknowledged is delivered again when the service is back, and
``source`` + ``seq`` make a delivery of already committed samples a duplicate, not a
second sample."""

from __future__ import annotations

import json
import logging
import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from ..config import MqttBroker, mqtt_broker
from .ingest import Reply

log = logging.getLogger("curvekeeper.mqtt")

QOS = 1
#: first wait after a transient fault before the session is resumed (seconds), and the longest
RETRY_S = 0.5
RETRY_MAX_S = 30.0
#: the broker's DISCONNECT reason when another connection took this client id's session
SESSION_TAKEN_OVER = 142
#: a process with no session to keep (expiry 0) learns, when it stops, what the broker still
#: sends it until none has come for DRAIN_QUIET_S, for at most DRAIN_MAX_S (seconds)
DRAIN_QUIET_S = 1.0
DRAIN_MAX_S = 30.0


@dataclass(frozen=True)
class Topics:
    """``{root}/samples/{channel_id}`` in, ``{root}/results/{channel_id}`` out; the samples
    subscribed to as the shared-subscription group ``share_group`` (empty: not shared)."""

    root: str = "curvekeeper/v1"
    share_group: str = ""

    @property
    def plain_filter(self) -> str:
        return f"{self.root}/samples/+"

    @property
    def samples_filter(self) -> str:
        """What the service subscribes to: ``$share/<group>/<root>/samples/+``, or the plain filter."""
        return f"$share/{self.share_group}/{self.plain_filter}" if self.share_group else self.plain_filter

    @property
    def stale_filters(self) -> tuple[str, ...]:
        """The plain subscription a persistent session still holds from before its process
        joined a group: unsubscribed at connect, else the session would hold both and get
        each message twice. (The other way round, or to another group: new client ids.)"""
        return (self.plain_filter,) if self.share_group else ()

    def channel(self, topic: str) -> str | None:
        head = f"{self.root}/samples/"
        rest = topic[len(head):] if topic.startswith(head) else ""
        return rest if rest and "/" not in rest else None

    def results(self, channel_id: str) -> str:
        return f"{self.root}/results/{channel_id}"


@dataclass(frozen=True)
class _Message:
    generation: int
    mid: int
    topic: str
    payload: bytes


Handler = Callable[[str, bytes], Reply]


def make_client(broker: MqttBroker, client_id: str, *, manual_ack: bool = False) -> paho.Client:
    """A paho-mqtt MQTT 5 client for ``broker``: its login, TLS for mqtts://, reconnecting
    after 1 s, doubling to 30 s."""
    client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv5,
                         manual_ack=manual_ack)
    if broker.username:
        client.username_pw_set(broker.username, broker.password)
    if broker.tls:
        client.tls_set()
    client.reconnect_delay_set(1, 30)
    return client


class Subscriber:
    """``start()`` connects and subscribes; ``stop()`` disconnects and waits for the worker
    (a message being learned is finished; the ones not yet acknowledged come again).

    With ``session_expiry_s`` 0 no session outlives the connection, so ``stop()`` first
    unsubscribes and learns what the broker still sends: the way to retire a process's
    client id for good (in a group, the other members take every message from then on)."""

    def __init__(self, url: str, handle: Handler, *, client_id: str, topics: Topics,
                 session_expiry_s: int = 7 * 24 * 3600, keepalive_s: int = 30) -> None:
        self.broker = mqtt_broker(url)  # ValueError for a URL that is not mqtt:// or mqtts://
        self.host, self.port = self.broker.host, self.broker.port
        self.client_id = client_id
        self.handle = handle
        self.topics = topics
        self.keepalive_s = keepalive_s
        self.session_expiry_s = session_expiry_s
        self.client = self._new_client()
        self._connect_props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
        self._connect_props.SessionExpiryInterval = session_expiry_s
        self._inbox: queue.Queue[_Message | None] = queue.Queue()
        self._generation = 0  # one per connection: a message id means something only on its own
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._draining = False
        self._pending = 0  # messages received and not yet handled
        self._last_in = time.monotonic()
        self._worker = threading.Thread(target=self._work, name="curvekeeper-mqtt", daemon=True)

    def _new_client(self) -> paho.Client:
        """A paho client for one stretch of connections; the session lives in the broker,
        found again by the client id (``clean_start`` false), not in this object."""
        client = make_client(self.broker, self.client_id, manual_ack=True)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        return client

    # --- paho's thread ---------------------------------------------------------------

    def _on_connect(self, client: paho.Client, _userdata: Any, _flags: Any, reason: Any, _props: Any) -> None:
        if reason.is_failure:
            log.error("MQTT broker %s:%d refused the connection: %s", self.host, self.port, reason)
            return
        with self._lock:
            self._generation += 1
            if self._draining:
                return  # retiring: what the session holds comes without a subscription
        client.subscribe(self.topics.samples_filter, qos=QOS)
        for stale in self.topics.stale_filters:  # after the subscription: a message between the two
            client.unsubscribe(stale)            # comes twice (source + seq make it a duplicate), none is lost
        log.info("MQTT: subscribed to %s on %s:%d as client %s", self.topics.samples_filter, self.host, self.port,
                 self.client_id)

    def _on_disconnect(self, _client: paho.Client, _userdata: Any, _flags: Any, reason: Any, _props: Any) -> None:
        if not getattr(reason, "is_failure", False):
            return  # our own disconnect (a resume, the stop)
        if getattr(reason, "value", None) == SESSION_TAKEN_OVER:
            log.error("MQTT: another connection took the session of client id %r: each service process needs "
                      "a CURVEKEEPER_MQTT_CLIENT_ID of its own", self.client_id)
            return
        # Mosquitto 2.0.11 closes a taken-over connection without saying why: the same words
        log.warning("MQTT: connection to %s:%d lost as client id %r (%s); reconnecting. Lost again and again a "
                    "few seconds apart: another process may connect with the same id (each service process needs "
                    "a CURVEKEEPER_MQTT_CLIENT_ID of its own)", self.host, self.port, self.client_id, reason)

    def _on_message(self, _client: paho.Client, _userdata: Any, msg: paho.MQTTMessage) -> None:
        with self._lock:
            generation = self._generation
            self._pending += 1
            self._last_in = time.monotonic()
        self._inbox.put(_Message(generation, msg.mid, msg.topic, bytes(msg.payload)))

    # --- the worker ------------------------------------------------------------------

    def _work(self) -> None:
        wait = RETRY_S
        while True:
            item = self._inbox.get()
            if item is None:
                return
            try:
                with self._lock:
                    current = item.generation == self._generation
                if not current:
                    continue  # from a connection since closed: the broker delivers it again
                reply = self._reply(item)
                if reply.ack:
                    self.client.ack(item.mid, QOS)
                    wait = RETRY_S
                    continue
            finally:
                with self._lock:
                    self._pending -= 1
            if self._stopping.wait(wait):
                return
            wait = min(2 * wait, RETRY_MAX_S)
            self._resume_session()

    def _reply(self, item: _Message) -> Reply:
        channel_id = self.topics.channel(item.topic)
        if channel_id is None:  # the subscription's filter admits no other topic
            log.warning("MQTT: message on an unexpected topic %r acknowledged and ignored", item.topic)
            return Reply(404, {}, True)
        try:
            reply = self.handle(channel_id, item.payload)
        except Exception:
            # a fault of the service, not of the message: answered (as HTTP answers 500), so
            # one message cannot stop every later one
            log.exception("unexpected error on an MQTT message for %s", channel_id)
            reply = Reply(500, {"error": {"code": "internal_error", "details": None,
                                          "message": "an unexpected error occurred; it has been logged"}})
        if reply.ack:
            self.client.publish(self.topics.results(channel_id), json.dumps(reply.body), qos=QOS)
        return reply

    def _resume_session(self) -> None:
        """Drop this connection (and the messages it delivered) and connect again on the
        same session: the broker then delivers its unacknowledged messages again."""
        log.info("MQTT: resuming the session so the broker delivers unacknowledged messages again")
        self._close_client()
        # A new client object rather than loop_start again on the old one, whose socket pair
        # paho 2.2 would leave open (tests/mqtt/test_subscriber.py counts open files over resumes)
        with self._lock:
            self._generation += 1  # whatever is still queued belongs to the closed connection
            self.client = self._new_client()
        if not self._stopping.is_set():
            self._connect()

    def _close_client(self) -> None:
        """Disconnect and stop the network thread, then close the client's sockets.

        paho 2.2 closes its wake-up socket pair (made by each ``loop_start``) only in private
        ``_reset_sockets`` or at garbage collection (a cycle's finaliser order can then warn of
        an unclosed socket). ``reinitialise()`` is the public call that closes them; it also
        resets the object to a client of paho's defaults, which is why it comes last and the
        object is not used again."""
        self.client.disconnect()
        self.client.loop_stop()
        self.client.reinitialise()

    def _connect(self) -> None:
        self.client.connect_async(self.host, self.port, keepalive=self.keepalive_s, clean_start=False,
                                  properties=self._connect_props)
        self.client.loop_start()

    # --- the app's side --------------------------------------------------------------

    def start(self) -> None:
        """Connect in the background (paho retries until the broker answers) and start learning."""
        self._worker.start()
        self._connect()

    def stop(self) -> None:
        if self.session_expiry_s == 0:
            self._drain()
        self._stopping.set()
        self._inbox.put(None)
        self._worker.join(timeout=30)
        self._close_client()

    def _drain(self) -> None:
        """Unsubscribe, then learn what the broker still sends (the session's queue, what was
        in flight) until it has been quiet for ``DRAIN_QUIET_S``."""
        with self._lock:
            self._draining = True
            self._last_in = time.monotonic()
        if self.client.is_connected():
            self.client.unsubscribe(self.topics.samples_filter)
        log.info("MQTT: client id %r retiring (session expiry 0): learning what the broker still holds for it",
                 self.client_id)
        deadline = time.monotonic() + DRAIN_MAX_S
        while time.monotonic() < deadline:
            with self._lock:
                idle = self._pending == 0 and time.monotonic() - self._last_in >= DRAIN_QUIET_S
            if idle:
                return
            time.sleep(0.05)
        log.warning("MQTT: client id %r still receiving after %.0f s; stopping", self.client_id, DRAIN_MAX_S)
