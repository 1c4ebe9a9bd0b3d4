"""A small synchronous client for devices, gateways and tests (httpx).

Retries: a request is retried on a 503 or 429 (the server stored nothing and says when to
come back: ``Retry-After``, seconds or an HTTP date), and on connection failures and
timeouts, with exponential backoff and jitter. Another 4xx or a 5xx is never retried: it
raises ``ClientError`` at once. A request whose outcome is unknown (the connection broke or
timed out after it was sent) is retried only when repeating it is harmless: reads, and
sample posts with a ``source`` and a ``seq`` on every sample, which the server stores at
most once. Snapshots, rollbacks and channel creation are retried only when the server
surely did not act on them (no connection made, or a 503/429 answer).

>>> with Client("http://127.0.0.1:8000", "ck_secret") as c:  # doctest: +SKIP
...     c.post_samples("coldroom2.probe07", [{"x": 10234.5, "y": 24.87, "seq": 17}], source="gw-3")
"""

from __future__ import annotations

import random
import time
from collections.abc import Callable, Mapping, Sequence
from datetime import UTC, datetime
from email.utils import parsedate_to_datetime
from typing import Any

import httpx

__all__ = ["Client", "ClientError"]

Sample = Mapping[str, Any]


class ClientError(Exception):
    """A request failed for good. ``status``: the HTTP status, or None when no answer came
    (``code`` is then ``"unreachable"``); ``code``, ``message``, ``details``: the error body."""

    def __init__(self, status: int | None, code: str, message: str, details: Any = None) -> None:
        super().__init__(f"{status or 'no answer'} {code}: {message}")
        self.status = status
        self.code = code
        self.message = message
        self.details = details


def retry_after(response: httpx.Response) -> float | None:
    """The ``Retry-After`` header in seconds (from a delay or an HTTP date), or None."""
    value = response.headers.get("retry-after")
    if value is None:
        return None
    try:
        return max(0.0, float(value))
    except ValueError:
        pass
    try:
        when = parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return max(0.0, (when - datetime.now(UTC)).total_seconds())


def _error(response: httpx.Response) -> ClientError:
    try:
        err = response.json()["error"]
        return ClientError(response.status_code, str(err["code"]), str(err["message"]), err.get("details"))
    except (ValueError, KeyError, TypeError):
        return ClientError(response.status_code, "http_error", response.text[:200] or response.reason_phrase)


class Client:
    """A client with one API key.

    base_url : the service's address, e.g. ``http://127.0.0.1:8000``
    key : the API key's secret (sent as ``Authorization: Bearer``)
    timeout : seconds to wait for a connection and for each read or write
    max_retries : retries after the first attempt (0: never retry)
    backoff : seconds of the first retry's delay; each retry doubles it, up to ``max_backoff``
    seed : seeds the jitter (random.Random), for reproducible delays
    transport, sleep : seams for tests (an ``httpx.MockTransport``; a fake sleep)
    """

    def __init__(self, base_url: str, key: str, *, timeout: float = 10.0, max_retries: int = 5,
                 backoff: float = 0.1, max_backoff: float = 5.0, seed: int | None = None,
                 transport: httpx.BaseTransport | None = None,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.max_retries = max_retries
        self.backoff = backoff
        self.max_backoff = max_backoff
        self.retries = 0  # retries made so far, all requests together
        self._rng = random.Random(seed)
        self._sleep = sleep
        self._http = httpx.Client(base_url=base_url, timeout=timeout, transport=transport,
                                  headers={"Authorization": f"Bearer {key}"})

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._http.close()

    def delay(self, attempt: int, response: httpx.Response | None = None) -> float:
        """Seconds to wait before retry ``attempt`` (0-based): half the exponential step
        plus a random half, and never less than the server's ``Retry-After``."""
        step = min(self.max_backoff, self.backoff * 2.0 ** attempt)
        wait = step / 2 + self._rng.uniform(0.0, step / 2)
        hint = retry_after(response) if response is not None else None
        return wait if hint is None else max(wait, hint)

    def request(self, method: str, path: str, *, json: Any = None, idempotent: bool = True,
                raw: bool = False) -> Any:
        """Send a request with retries; the decoded JSON answer (``raw``: the body's bytes, e.g.
        a PDF), or ``ClientError``."""
        attempt = 0
        while True:
            response: httpx.Response | None = None
            try:
                response = self._http.request(method, path, json=json)
            except (httpx.ConnectError, httpx.ConnectTimeout, httpx.PoolTimeout) as exc:
                failure: Exception = exc  # never reached the server: always safe to repeat
            except httpx.TransportError as exc:
                if not idempotent:
                    raise ClientError(None, "unreachable", f"outcome unknown: {exc!r}") from exc
                failure = exc
            else:
                if response.status_code < 400:
                    if raw:
                        return response.content
                    return response.json() if response.content else None
                if response.status_code not in (429, 503):
                    raise _error(response)
                failure = _error(response)
            if attempt >= self.max_retries:
                if isinstance(failure, ClientError):
                    raise failure
                raise ClientError(None, "unreachable", repr(failure)) from failure
            self._sleep(self.delay(attempt, response))
            attempt += 1
            self.retries += 1

    # the routes ------------------------------------------------------------------------
    def post_samples(self, channel: str, samples: Sequence[Sample], source: str | None = None) -> dict[str, Any]:
        """Learn from ``samples`` (``{"x", "y", "t"?, "seq"?}``, x in input units, y in output
        units). With ``source`` and a ``seq`` on each, a retry is idempotent: already
        stored samples come back as ``duplicates``."""
        body: dict[str, Any] = {"samples": list(samples)}
        if source is not None:
            body["source"] = source
        out: dict[str, Any] = self.request("POST", f"/v1/channels/{channel}/samples", json=body,
                                           idempotent=_keyed(samples, source))
        return out

    def post_gateway(self, samples: Sequence[Sample], source: str | None = None) -> dict[str, Any]:
        """A gateway batch across channels (``channel`` on each sample); retries as ``post_samples``."""
        body: dict[str, Any] = {"samples": list(samples)}
        if source is not None:
            body["source"] = source
        out: dict[str, Any] = self.request("POST", "/v1/samples", json=body, idempotent=_keyed(samples, source))
        return out

    def predict(self, channel: str, x: Sequence[float | Sequence[float]], snapshot: int | None = None
                ) -> dict[str, Any]:
        """Calibrated values ``y`` (output units) with standard uncertainty ``u`` and factor ``k``."""
        out: dict[str, Any] = self.request("POST", f"/v1/channels/{channel}/predict",
                                           json={"x": list(x), "snapshot": snapshot})
        return out

    def create_channel(self, config: Mapping[str, Any]) -> dict[str, Any]:
        """Create a channel (the contract's channel body); the full config back."""
        out: dict[str, Any] = self.request("POST", "/v1/channels", json=dict(config), idempotent=False)
        return out

    def get_channel(self, channel: str) -> dict[str, Any]:
        """Config and summary (n_samples, rmse, drift, version)."""
        out: dict[str, Any] = self.request("GET", f"/v1/channels/{channel}")
        return out

    def take_snapshot(self, channel: str, label: str | None = None) -> dict[str, Any]:
        """Store a copy of the channel's model state; its ``id`` and ``version``."""
        out: dict[str, Any] = self.request("POST", f"/v1/channels/{channel}/snapshots",
                                           json={"label": label} if label is not None else None,
                                           idempotent=False)
        return out

    def rollback(self, channel: str, snapshot: int, *, set_reference: bool = False,
                 reason: str | None = None) -> dict[str, Any]:
        """Restore snapshot ``snapshot``; the state before is kept as ``snapshot_before``; with
        ``set_reference`` the restored curve becomes the reference; ``reason`` goes to the log."""
        body: dict[str, Any] = {"snapshot": snapshot, "set_reference": set_reference}
        if reason is not None:
            body["reason"] = reason
        out: dict[str, Any] = self.request("POST", f"/v1/channels/{channel}/rollback", json=body, idempotent=False)
        return out


def _keyed(samples: Sequence[Sample], source: str | None) -> bool:
    return source is not None and all(s.get("seq") is not None for s in samples)
