"""The MQTT side: a paho-mqtt client on a persistent session (QoS 1, a fixed client id,
``clean_start`` false, a session expiry), its network loop in paho's thread, and one worker
thread that learns the messages in the order they arrived.

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
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any
from urllib.parse import unquote, urlsplit

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from .ingest import Reply

log = logging.getLogger("curvekeeper.mqtt")

QOS = 1
#: first wait after a transient fault before the session is resumed (seconds), and the longest
RETRY_S = 0.5
RETRY_MAX_S = 30.0


@dataclass(frozen=True)
class Topics:
    """``{root}/samples/{channel_id}`` in, ``{root}/results/{channel_id}`` out."""

    root: str = "curvekeeper/v1"

    @property
    def samples_filter(self) -> str:
        return f"{self.root}/samples/+"

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


class Subscriber:
    """``start()`` connects and subscribes; ``stop()`` disconnects and waits for the worker
    (a message being learned is finished; the ones not yet acknowledged come again)."""

    def __init__(self, url: str, handle: Handler, *, client_id: str, topics: Topics,
                 session_expiry_s: int = 7 * 24 * 3600, keepalive_s: int = 30) -> None:
        parts = urlsplit(url)
        if parts.scheme not in ("mqtt", "mqtts") or not parts.hostname:
            raise ValueError(f"not an MQTT URL (mqtt://host:port or mqtts://host:port): {url!r}")
        self.host = parts.hostname
        self.port = parts.port or (8883 if parts.scheme == "mqtts" else 1883)
        self.handle = handle
        self.topics = topics
        self.keepalive_s = keepalive_s
        self.client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                  protocol=paho.MQTTv5, manual_ack=True)
        if parts.username:
            self.client.username_pw_set(unquote(parts.username),
                                        unquote(parts.password) if parts.password else None)
        if parts.scheme == "mqtts":
            self.client.tls_set()
        self.client.reconnect_delay_set(1, 30)
        self.client.on_connect = self._on_connect
        self.client.on_message = self._on_message
        self._connect_props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
        self._connect_props.SessionExpiryInterval = session_expiry_s
        self._inbox: queue.Queue[_Message | None] = queue.Queue()
        self._generation = 0  # one per connection: a message id means something only on its own
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._worker = threading.Thread(target=self._work, name="curvekeeper-mqtt", daemon=True)

    # --- paho's thread ---------------------------------------------------------------

    def _on_connect(self, client: paho.Client, _userdata: Any, _flags: Any, reason: Any, _props: Any) -> None:
        if reason.is_failure:
            log.error("MQTT broker %s:%d refused the connection: %s", self.host, self.port, reason)
            return
        with self._lock:
            self._generation += 1
        client.subscribe(self.topics.samples_filter, qos=QOS)
        log.info("MQTT: subscribed to %s on %s:%d", self.topics.samples_filter, self.host, self.port)

    def _on_message(self, _client: paho.Client, _userdata: Any, msg: paho.MQTTMessage) -> None:
        with self._lock:
            generation = self._generation
        self._inbox.put(_Message(generation, msg.mid, msg.topic, bytes(msg.payload)))

    # --- the worker ------------------------------------------------------------------

    def _work(self) -> None:
        wait = RETRY_S
        while True:
            item = self._inbox.get()
            if item is None:
                return
            with self._lock:
                current = item.generation == self._generation
            if not current:
                continue  # from a connection since closed: the broker delivers it again
            reply = self._reply(item)
            if reply.ack:
                self.client.ack(item.mid, QOS)
                wait = RETRY_S
                continue
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
        self.client.disconnect()
        self.client.loop_stop()
        # paho's loop_start makes a new wake-up socket pair without closing the old one
        self.client._reset_sockets(sockpair_only=True)
        with self._lock:
            self._generation += 1  # whatever is still queued belongs to the closed connection
        if not self._stopping.is_set():
            self._connect()

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
        self._stopping.set()
        self._inbox.put(None)
        self._worker.join(timeout=30)
        self.client.disconnect()
        self.client.loop_stop()
