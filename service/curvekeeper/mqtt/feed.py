"""Events out over MQTT: each channel event of a deliverable kind (``webhooks.KINDS``, the
webhooks' list) is published on ``{root}/events/{channel_id}`` with QoS 1, as the JSON a
webhook receives (without the signature: the broker's ACL says who may write there).

The store's event log is the source, read in order after a cursor kept in the store
(``event_feed``): an event is committed with the change that caused it, and the feed
publishes it afterwards, so nothing is published that did not happen and a restart loses
nothing (at least once: a crash after a publish and before the cursor moves publishes it
again; the event ``id`` tells a repeat). One process publishes at a time, holding a lease
on the cursor row; with several processes on one store another takes over once a holder's
lease runs out. A feed started for the first time begins at the latest event, not with the
history. Its own MQTT connection (client id ``{mqtt_client_id}-events``), apart from the
samples subscription, so a slow broker acknowledgement never holds up learning."""

from __future__ import annotations

import asyncio
import json
import logging
import os
import socket
from collections.abc import Awaitable, Callable
from contextlib import suppress
from datetime import datetime, timedelta

import paho.mqtt.client as paho

from ..actions.unit import Work, in_thread_to_end
from ..config import mqtt_broker
from ..errors import ServiceError
from ..metrics import Metrics
from ..webhooks import KINDS
from ..webhooks.dispatcher import event_json
from .subscriber import make_client

log = logging.getLogger("curvekeeper.mqtt")

#: the cursor row's name
FEED = "mqtt"
#: events published per pass at most
BATCH = 200

#: (topic, payload) -> True once the broker has acknowledged it
Publish = Callable[[str, bytes], bool]


class EventFeed:
    """Publishes what the event log holds after the cursor. ``publish`` is injectable (tests);
    ``run_once(now)`` is one pass at time ``now`` (default: the work's clock)."""

    def __init__(self, work: Work, publish: Publish, *, root: str = "curvekeeper/v1", owner: str | None = None,
                 lease_s: float = 60.0, metrics: Metrics | None = None) -> None:
        self.work, self.publish, self.root, self.metrics = work, publish, root, metrics
        self.owner = owner or f"{socket.gethostname()}:{os.getpid()}"[:64]
        self.lease = timedelta(seconds=lease_s)

    def prepare(self) -> None:
        """Make the feed's cursor if it is new (at the latest event): before the service
        takes requests, so every event after its first start is published."""
        with self.work.unit(write=True) as unit:
            unit.repo.ensure_feed(FEED)

    def topic(self, channel_id: str) -> str:
        return f"{self.root}/events/{channel_id}"

    def run_once(self, now: datetime | None = None) -> int:
        """One pass: publish up to ``BATCH`` events in order, stop at the first the broker
        does not acknowledge (it is tried again next pass); move the cursor. The count published."""
        now = now or self.work.clock()
        with self.work.unit(write=True) as unit:
            last = unit.repo.lease_feed(FEED, self.owner, now, now + self.lease)
            if last is None:
                return 0  # another process publishes
            out = [(ev.pk, self.topic(cid), json.dumps(event_json(ev, cid, ev.at)).encode())
                   for ev, cid in unit.repo.feed_events(last, KINDS, BATCH)]
        done = last
        for pk, topic, raw in out:
            if not self.publish(topic, raw):
                break
            done = pk
        if done > last:
            with self.work.unit(write=True) as unit:
                unit.repo.advance_feed(FEED, self.owner, done)
        n = sum(1 for pk, _, _ in out if pk <= done)
        if self.metrics is not None and n:
            self.metrics.mqtt_events.inc(n)
        return n

    async def run_forever(self, interval_s: float,
                          sleep: Callable[[float], Awaitable[None]] = asyncio.sleep) -> None:
        """A pass every ``interval_s`` seconds in a worker thread; a busy store or a broker
        away only delays it."""
        while True:
            await sleep(interval_s)
            try:
                n = await in_thread_to_end(self.run_once)
                if n:
                    log.debug("MQTT: %d event(s) published", n)
            except ServiceError as exc:
                log.warning("MQTT event feed skipped: %s", exc.message)


class Publisher:
    """A paho-mqtt connection that publishes with QoS 1 and waits for the broker's PUBACK
    (``timeout_s`` at most). Not connected: nothing is published (the feed tries later)."""

    def __init__(self, url: str, client_id: str, *, timeout_s: float = 10.0, keepalive_s: int = 30) -> None:
        self.broker = mqtt_broker(url)
        self.timeout_s, self.keepalive_s = timeout_s, keepalive_s
        self.client = make_client(self.broker, client_id)

    def __call__(self, topic: str, raw: bytes) -> bool:
        if not self.client.is_connected():
            return False
        info = self.client.publish(topic, raw, qos=1)
        if info.rc != paho.MQTT_ERR_SUCCESS:
            return False
        with suppress(RuntimeError, ValueError):  # the connection went meanwhile
            info.wait_for_publish(self.timeout_s)
        return info.is_published()

    def start(self) -> None:
        self.client.connect_async(self.broker.host, self.broker.port, keepalive=self.keepalive_s)
        self.client.loop_start()

    def stop(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()
