"""Prometheus metrics, one registry per app (so tests can run several apps).

Two kinds: counters and histograms this process updates as it works (requests, samples),
and gauges read from the store at scrape (``StoreGauges``: one query, cached for a few
seconds, so a scraper every second costs one query per ``ttl``). Every label value comes
from a fixed set, never from a request or a channel id. A new family of either kind (e.g.
messages in over a broker, webhook deliveries, an outbox's depth) goes beside these: a
counter on ``Metrics``, or a reading added to ``StoreGauges``.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from http import HTTPStatus
from threading import Lock

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.core import GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from .core.jit import specializations

# label values come from these fixed sets only: a label taken from the request as sent
# makes a new series per distinct value, and a client could grow memory and /metrics without end
METHODS = ("GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS")
_METHODS = frozenset(METHODS)
_STATUSES = frozenset(int(s) for s in HTTPStatus)
UNMATCHED = "unmatched"
#: the ``state`` label of ``curvekeeper_channels``: live channels count under each state that
#: applies (drift ok / warning / alarm, ...); archived ones only under ``archived``
CHANNEL_STATES = ("ok", "warning", "alarm", "out_of_tolerance", "out_of_service", "stale", "archived", "damaged",
                  "overdue")

#: the ``state`` label of ``curvekeeper_webhook_outbox``
OUTBOX_STATES = ("pending", "dead")
#: the ``outcome`` label of ``curvekeeper_webhook_deliveries_total``: an attempt delivered, failed
#: (to be retried), or failed for the last time (dead-lettered)
DELIVERY_OUTCOMES = ("delivered", "failed", "dead")
#: the ``outcome`` label of ``curvekeeper_mqtt_messages_total``: learned (a 2xx answer), refused
#: (a 4xx error result), failed (a 5xx error result), deferred (not acknowledged: the store was
#: busy; the broker delivers it again)
MQTT_OUTCOMES = ("accepted", "refused", "failed", "deferred")

log = logging.getLogger("curvekeeper.metrics")


@dataclass(frozen=True)
class StoreReading:
    """What the store tells at a scrape: channels by state (``CHANNEL_STATES``) and webhook
    deliveries by state (``OUTBOX_STATES``; ``pending`` is the outbox's depth)."""

    channels: Mapping[str, int]
    outbox: Mapping[str, int]


def mqtt_outcome(status: int, acknowledged: bool) -> str:
    """A message's outcome label from its answer's status and whether it was acknowledged."""
    if not acknowledged:
        return "deferred"
    return "accepted" if status < 400 else "refused" if status < 500 else "failed"


def method_label(method: str) -> str:
    """The method as a label: one of ``METHODS``, else ``other``."""
    return method if method in _METHODS else "other"


def status_label(status: int) -> str:
    """The status code as a label: a registered HTTP status, else its class (``5xx``)."""
    return str(status) if status in _STATUSES else f"{min(max(status // 100, 1), 5)}xx"


class StoreGauges(Collector):
    """Gauges read from the store when scraped: ``read()`` gives a ``StoreReading``, kept
    for ``ttl`` seconds. A store that cannot answer leaves the families out of that scrape
    (logged), never fails it."""

    def __init__(self, read: Callable[[], StoreReading], ttl: float,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.read = read
        self.ttl = ttl
        self.clock = clock
        self._lock = Lock()
        self._counts: StoreReading | None = None
        self._until = -float("inf")

    def counts(self) -> StoreReading | None:
        with self._lock:  # one scrape counts; one arriving meanwhile takes its result
            if self._counts is None or self.clock() >= self._until:
                try:
                    self._counts = self.read()
                except Exception as exc:  # a busy or lost store: this scrape goes without them
                    log.warning("store gauges not read: %s", exc)
                    return None
                self._until = self.clock() + self.ttl
            return self._counts

    def collect(self) -> Iterator[Metric]:
        counts = self.counts()
        if counts is None:
            return
        family = GaugeMetricFamily("curvekeeper_channels", "Channels by state: live ones under each state that "
                                   "applies, archived ones under archived only", labels=["state"])
        for state in CHANNEL_STATES:
            family.add_metric([state], counts.channels.get(state, 0))
        yield family
        outbox = GaugeMetricFamily("curvekeeper_webhook_outbox", "Webhook deliveries by state: pending (the "
                                   "outbox's depth) and dead (dead-lettered, to be re-sent by hand)", labels=["state"])
        for state in OUTBOX_STATES:
            outbox.add_metric([state], counts.outbox.get(state, 0))
        yield outbox


class Metrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        self.requests = Counter("curvekeeper_http_requests_total", "HTTP requests by route and status",
                                ["method", "route", "status"], registry=self.registry)
        self.latency = Histogram("curvekeeper_http_request_seconds", "HTTP request latency by route",
                                 ["method", "route"], registry=self.registry,
                                 buckets=(0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5))
        self.samples = Counter("curvekeeper_samples_total", "Samples by outcome", ["outcome"],
                               registry=self.registry)
        self.drift_alarms = Counter("curvekeeper_drift_alarms_total", "Drift alarms raised",
                                    registry=self.registry)
        self.deliveries = Counter("curvekeeper_webhook_deliveries_total", "Webhook delivery attempts by outcome",
                                  ["outcome"], registry=self.registry)
        self.mqtt_messages = Counter("curvekeeper_mqtt_messages_total", "MQTT sample messages by outcome",
                                     ["outcome"], registry=self.registry)
        self.mqtt_events = Counter("curvekeeper_mqtt_events_published_total",
                                   "Events published on the MQTT events topics", registry=self.registry)
        for outcome in DELIVERY_OUTCOMES:  # every series from the start, at zero
            self.deliveries.labels(outcome)
        for outcome in MQTT_OUTCOMES:
            self.mqtt_messages.labels(outcome)
        # grows whenever a call compiles or loads machine code: flat while serving means no request waited
        Gauge("curvekeeper_kernel_specializations", "Compiled kernel specialisations loaded in this process",
              registry=self.registry).set_function(specializations)

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        """Counts one request; ``route`` is the matched route's template or ``UNMATCHED``
        (never the path as sent), and ``method`` and ``status`` are bounded here."""
        method = method_label(method)
        self.requests.labels(method, route, status_label(status)).inc()
        self.latency.labels(method, route).observe(seconds)

    def observe_samples(self, accepted: int, rejected: int, duplicates: int, alarms: int) -> None:
        self.samples.labels("accepted").inc(accepted)
        self.samples.labels("rejected").inc(rejected)
        self.samples.labels("duplicate").inc(duplicates)
        if alarms:
            self.drift_alarms.inc(alarms)

    def observe_delivery(self, outcome: str) -> None:
        """One webhook delivery attempt: an outcome of ``DELIVERY_OUTCOMES``."""
        self.deliveries.labels(outcome if outcome in DELIVERY_OUTCOMES else "failed").inc()

    def observe_mqtt(self, status: int, acknowledged: bool) -> None:
        """One MQTT sample message, by its answer's status and whether it was acknowledged."""
        self.mqtt_messages.labels(mqtt_outcome(status, acknowledged)).inc()

    def watch_store(self, gauges: StoreGauges) -> None:
        """Serve the store's gauges from now on (the app's lifespan calls it once the store is open)."""
        self.registry.register(gauges)

    def unwatch_store(self, gauges: StoreGauges) -> None:
        self.registry.unregister(gauges)

    def render(self) -> bytes:
        return generate_latest(self.registry)
