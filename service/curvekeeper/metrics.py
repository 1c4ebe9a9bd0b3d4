"""Prometheus metrics, one registry per app (so tests can run several apps)."""

from __future__ import annotations

from http import HTTPStatus

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest

from .core.jit import specializations

# label values come from these fixed sets only: a label taken from the request as sent
# makes a new series per distinct value, and a client could grow memory and /metrics without end
METHODS = ("GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS")
_METHODS = frozenset(METHODS)
_STATUSES = frozenset(int(s) for s in HTTPStatus)
UNMATCHED = "unmatched"


def method_label(method: str) -> str:
    """The method as a label: one of ``METHODS``, else ``other``."""
    return method if method in _METHODS else "other"


def status_label(status: int) -> str:
    """The status code as a label: a registered HTTP status, else its class (``5xx``)."""
    return str(status) if status in _STATUSES else f"{min(max(status // 100, 1), 5)}xx"


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

    def render(self) -> bytes:
        return generate_latest(self.registry)
