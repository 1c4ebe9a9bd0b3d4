"""Settings: the one place the environment is read (variables prefixed ``CURVEKEEPER_``).

``Settings.from_env(environ)`` takes any mapping, so tests inject their own.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Mapping
from dataclasses import dataclass, fields, replace
from typing import Any
from urllib.parse import unquote, urlsplit

PREFIX = "CURVEKEEPER_"


def _bool(v: str) -> bool:
    if v.lower() in ("1", "true", "yes", "on"):
        return True
    if v.lower() in ("0", "false", "no", "off", ""):
        return False
    raise ValueError(f"not a boolean: {v!r}")


@dataclass(frozen=True)
class MqttBroker:
    """Where ``mqtt_url`` points: host, port, TLS or not, the login (``%``-decoded)."""

    host: str
    port: int
    tls: bool
    username: str | None
    password: str | None


def mqtt_broker(url: str) -> MqttBroker:
    """``mqtt://[user:password@]host[:port]`` (port 1883) or ``mqtts://`` (TLS, port 8883);
    raises ``ValueError`` saying what is wrong (never repeating the URL: it may hold a password)."""
    what = "the MQTT broker URL (--mqtt, CURVEKEEPER_MQTT_URL)"
    parts = urlsplit(url)
    if parts.scheme not in ("mqtt", "mqtts"):
        scheme = f"{parts.scheme}://" if parts.scheme else "no scheme"
        raise ValueError(f"{what} must start with mqtt:// or mqtts:// (TLS), not {scheme}; "
                         "e.g. mqtt://127.0.0.1:1883")
    if not parts.hostname:
        raise ValueError(f"{what} names no host; e.g. mqtt://127.0.0.1:1883")
    try:
        port = parts.port
    except ValueError:
        raise ValueError(f"{what} has a port that is not a number from 1 to 65535") from None
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise ValueError(f"{what} is the broker's address only, without a path or query; "
                         "the topics come from CURVEKEEPER_MQTT_TOPIC_ROOT")
    return MqttBroker(parts.hostname, port or (8883 if parts.scheme == "mqtts" else 1883), parts.scheme == "mqtts",
                      unquote(parts.username) if parts.username else None,
                      unquote(parts.password) if parts.password else None)


def default_mqtt_client_id(port: int) -> str:
    """``curvekeeper-<host name>-<HTTP port>``: stable across restarts of one process and
    different for two processes on one host (they cannot listen on one port)."""
    return f"curvekeeper-{socket.gethostname()}-{port}"


@dataclass(frozen=True)
class Settings:
    """Service settings; each field's environment variable is ``CURVEKEEPER_<FIELD>``."""

    #: SQLAlchemy URL of the store (SQLite file by default; PostgreSQL for several processes)
    database_url: str = "sqlite:///curvekeeper.db"
    #: address and port ``curvekeeper serve`` listens on
    host: str = "127.0.0.1"
    port: int = 8000
    #: when set, an admin key with this secret is made sure to exist at start-up
    admin_key: str | None = None
    #: largest request body accepted, bytes (larger: 413)
    max_body_bytes: int = 8 * 1024 * 1024
    #: most samples in one request (more: 413)
    max_batch: int = 10_000
    #: most values in one predict request and points in one curve
    max_predict: int = 100_000
    max_curve_points: int = 10_001
    #: seconds a writer waits for the store before the request answers 503
    busy_timeout_s: float = 5.0
    #: browser origins allowed to call the API (comma-separated, e.g. https://ops.example.org); empty: none
    cors_origins: str = ""
    #: serve /metrics without a key (for a scraper on a private network)
    metrics_public: bool = False
    #: log level of the service's own loggers
    log_level: str = "info"
    #: requests per second each API key may make on average (0: no limit; over it: 429)
    rate_limit_per_s: float = 0.0
    #: requests a key may make at once before ``rate_limit_per_s`` holds it back
    rate_limit_burst: int = 100
    #: how far ahead of the server's clock a sample's time ``t`` may be, seconds (more: 422)
    max_clock_skew_s: float = 300.0
    #: a reference instrument due within this many days (its due date included) is due_soon
    reference_due_soon_days: int = 30
    #: seconds between sweeps that write the ``stale`` event of channels gone silent (0: no sweep;
    #: answers and lists still show ``stale`` at once, and the next sample writes the event)
    stale_sweep_s: float = 60.0
    #: seconds /metrics keeps the channel counts by state before counting again
    metrics_cache_s: float = 5.0
    #: broker to take samples from (mqtt://[user:password@]host[:port], mqtts:// for TLS); unset: no MQTT
    mqtt_url: str | None = None
    #: this process's MQTT client id: fixed, so its persistent session (and what the broker
    #: holds for it while the process is down) is found again on restart; each process has its
    #: own (two on one id take the session from each other). Empty: ``curvekeeper-<host>-<port>``
    mqtt_client_id: str = ""
    #: topics are ``{root}/samples/{channel_id}`` in and ``{root}/results/{channel_id}`` out
    mqtt_topic_root: str = "curvekeeper/v1"
    #: several processes: they subscribe as one MQTT 5 shared-subscription group of this name
    #: (``$share/<group>/<root>/samples/+``: each message goes to one of them), a name devices
    #: cannot guess. Empty: a plain subscription, for one process (two would each learn every message)
    mqtt_share_group: str = ""
    #: how long the broker keeps the session (and queues messages) while the service is away, seconds
    mqtt_session_expiry_s: int = 7 * 24 * 3600
    #: seconds between passes of the MQTT event feed (events on ``{root}/events/{channel_id}``; 0: none)
    mqtt_events_s: float = 1.0
    #: seconds between passes of the webhook dispatcher over the delivery outbox (0: no dispatcher)
    webhook_dispatch_s: float = 1.0
    #: first retry delay of a failed webhook delivery, seconds; attempt n waits base * 2**(n-1), plus jitter
    webhook_retry_base_s: float = 2.0
    #: attempts before a delivery is dead-lettered
    webhook_max_attempts: int = 8
    #: seconds a webhook receiver has to answer one delivery
    webhook_timeout_s: float = 10.0
    #: allow webhook URLs at link-local or cloud-metadata addresses (refused by default)
    webhook_allow_link_local: bool = False

    def __post_init__(self) -> None:
        if self.mqtt_url is not None:
            mqtt_broker(self.mqtt_url)
        if not self.mqtt_client_id:
            object.__setattr__(self, "mqtt_client_id", default_mqtt_client_id(self.port))
        if any(c in self.mqtt_share_group for c in "/+#"):
            raise ValueError(f"CURVEKEEPER_MQTT_SHARE_GROUP {self.mqtt_share_group!r}: a group name has no '/', "
                             "'+' or '#'")
        root = self.mqtt_topic_root
        if not root or any(c in root for c in "+#") or root.startswith(("/", "$")) or root.endswith("/"):
            raise ValueError(f"CURVEKEEPER_MQTT_TOPIC_ROOT {root!r}: topic levels without wildcards, "
                             "e.g. curvekeeper/v1")

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None, **overrides: Any) -> Settings:
        env = os.environ if environ is None else environ
        values: dict[str, Any] = {}
        for f in fields(cls):
            raw = env.get(PREFIX + f.name.upper())
            if raw is None:
                continue
            kind = str(f.type)
            if "bool" in kind:
                values[f.name] = _bool(raw)
            elif "int" in kind:
                values[f.name] = int(raw)
            elif "float" in kind:
                values[f.name] = float(raw)
            else:
                values[f.name] = raw
        values.update({k: v for k, v in overrides.items() if v is not None})
        return cls(**values)

    def with_(self, **changes: Any) -> Settings:
        if "mqtt_client_id" not in changes and self.mqtt_client_id == default_mqtt_client_id(self.port):
            changes["mqtt_client_id"] = ""  # derived from the port: derived again
        return replace(self, **changes)
