"""The dispatcher: empties the delivery outbox. Each pass claims due deliveries one by one
with a conditional UPDATE (several processes never send the same attempt twice), sends
outside any transaction, then records the outcome: delivered on a 2xx answer, else retried
after ``backoff`` until ``webhook_max_attempts`` attempts, then dead. All its state is in
the store, so a restart loses nothing (at least once: a crash after a send and before its
record sends it again once the claim's lease has run out)."""

from __future__ import annotations

import asyncio
import logging
import random
from collections.abc import Awaitable, Callable, Iterable
from contextlib import suppress
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import httpx

from ..actions.unit import Work
from ..config import Settings
from ..errors import ServiceError
from ..metrics import Metrics
from ..store.tables import Event
from . import TEST_KIND, policy, signing

log = logging.getLogger("curvekeeper.webhooks")

#: deliveries claimed per pass at most
BATCH = 100
#: jitter: a retry waits up to this fraction more than its exponential delay
JITTER = 0.5


@dataclass(frozen=True)
class Outcome:
    """A send's result: the receiver's HTTP status (None: no answer) and what went wrong."""

    status: int | None
    error: str | None = None

    @property
    def delivered(self) -> bool:
        return self.status is not None and 200 <= self.status < 300


#: (url, body, headers, timeout_s, address): POST to url's host at ``address``, the one checked
Sender = Callable[[str, bytes, dict[str, str], float, str], Outcome]


def pinned(url: str, address: str) -> tuple[str, str, str]:
    """``url`` with its host replaced by ``address`` (so the connection goes where the policy
    looked, whatever the name resolves to a moment later), the Host header and the TLS name."""
    parts = urlsplit(url)
    host = parts.hostname or ""
    ip = f"[{address}]" if ":" in address else address
    netloc = ip if parts.port is None else f"{ip}:{parts.port}"
    host_header = parts.netloc.rsplit("@", 1)[-1]
    return urlunsplit(parts._replace(netloc=netloc)), host_header, host


def http_send(url: str, raw: bytes, headers: dict[str, str], timeout_s: float, address: str) -> Outcome:
    """POST ``raw`` to ``url`` at ``address`` with httpx (the Host header and the TLS server
    name stay the URL's); redirects are not followed (one could lead past the address policy)."""
    target, host_header, server_name = pinned(url, address)
    try:
        with httpx.Client(timeout=timeout_s, follow_redirects=False) as client:
            r = client.post(target, content=raw, headers={**headers, "Host": host_header},
                            extensions={"sni_hostname": server_name})
    except httpx.HTTPError as exc:
        return Outcome(None, f"{type(exc).__name__}: {exc}"[:500])
    return Outcome(r.status_code, None if 200 <= r.status_code < 300 else f"HTTP {r.status_code}")


def backoff(attempt: int, base_s: float, jitter: float) -> float:
    """Seconds to wait after failed attempt ``attempt`` (1, 2, ...): ``base_s * 2**(attempt-1)``
    times ``1 + JITTER * jitter``, ``jitter`` uniform in [0, 1) (exponential backoff with
    jitter, common practice)."""
    return float(base_s * 2.0 ** (attempt - 1) * (1.0 + JITTER * jitter))


def event_json(ev: Event | None, channel: str | None, delivery_at: datetime) -> dict[str, Any]:
    """The event as the events routes answer it (with its channel's id); a test send's own."""
    if ev is None:
        return {"id": None, "kind": TEST_KIND, "channel": None, "at": delivery_at.isoformat(), "version": None,
                "key_id": None, "details": {}}
    return {"id": ev.pk, "kind": ev.kind, "channel": channel, "at": ev.at.isoformat(), "version": ev.version,
            "key_id": ev.key_id, "details": ev.details}


class Dispatcher:
    """Sends what the outbox owes. ``send``, ``resolver`` and ``rng`` are injectable (tests);
    ``run_once(now)`` is one pass at time ``now`` (default: the work's clock); ``metrics``
    counts the attempts by outcome."""

    def __init__(self, work: Work, settings: Settings, *, send: Sender = http_send,
                 resolver: Callable[[str], Iterable[str]] = policy.resolve,
                 rng: Callable[[], float] = random.random, metrics: Metrics | None = None) -> None:
        self.work, self.settings, self.send, self.resolver, self.rng = work, settings, send, resolver, rng
        self.metrics = metrics
        #: how long a claim holds a delivery: a sender that dies meanwhile leaves it to another
        self.lease = timedelta(seconds=3 * settings.webhook_timeout_s + 30)
        #: set when the service stops: a pass ends after its current attempt
        self.stopping = False

    def run_once(self, now: datetime | None = None) -> int:
        """One pass: every delivery due at ``now`` gets one attempt, except those of a webhook
        whose attempt failed earlier in the pass: they stay due for the next pass, so a
        receiver that is down or slow costs a pass one timeout, not one per delivery it is
        owed, and the other receivers are not held up. Returns the attempts made."""
        now = now or self.work.clock()
        with self.work.unit(write=False) as unit:
            due = unit.repo.due_deliveries(now, BATCH)
        made, failing = 0, set()
        for pk, hook in due:
            if self.stopping:  # the service is stopping: the rest stay due for the next start
                break
            if hook in failing:
                continue
            outcome = self._attempt(pk, now)
            made += outcome is not None
            if outcome is not None and not outcome.delivered:
                failing.add(hook)
        return made

    def _attempt(self, pk: int, now: datetime) -> Outcome | None:
        """One attempt at delivery ``pk``: its outcome, or None when another process took it."""
        with self.work.unit(write=True) as unit:
            if not unit.repo.claim_delivery(pk, now, now + self.lease):
                return None  # another process took it
            d, hook, ev, channel = unit.repo.delivery_to_send(pk)
            url, secret, attempts = hook.url, hook.secret, d.attempts
            raw = signing.body(pk, event_json(ev, channel, d.created_at))
        outcome = self._send(url, secret, pk, raw)
        s = self.settings
        if outcome.delivered:
            values: dict[str, Any] = {"state": "delivered", "delivered_at": now, "last_status": outcome.status,
                                      "last_error": None}
        elif attempts >= s.webhook_max_attempts:
            values = {"state": "dead", "last_status": outcome.status, "last_error": outcome.error}
        else:
            wait = backoff(attempts, s.webhook_retry_base_s, self.rng())
            values = {"next_attempt_at": now + timedelta(seconds=wait), "last_status": outcome.status,
                      "last_error": outcome.error}
        with self.work.unit(write=True) as unit:
            unit.repo.record_delivery(pk, **values)
        if self.metrics is not None:
            self.metrics.observe_delivery(values.get("state", "failed"))
        return outcome

    def _send(self, url: str, secret: str, pk: int, raw: bytes) -> Outcome:
        try:  # the host is resolved again: it may point elsewhere now than when the webhook was made
            addrs = policy.check(url, allow_link_local=self.settings.webhook_allow_link_local,
                                 resolver=self.resolver)
        except policy.Refused as exc:
            return Outcome(None, f"refused: {exc}")
        headers = {"Content-Type": "application/json", signing.SIGNATURE_HEADER: signing.sign(secret, raw),
                   signing.DELIVERY_HEADER: str(pk)}
        return self.send(url, raw, headers, self.settings.webhook_timeout_s, addrs[0])

    async def run_forever(self, interval_s: float,
                          sleep: Callable[[float], Awaitable[None]] = asyncio.sleep) -> None:
        """The service's dispatcher: a pass every ``interval_s`` seconds in a worker thread
        (sends wait on the network; ingest never waits on them)."""
        while True:
            await sleep(interval_s)
            running = asyncio.ensure_future(asyncio.to_thread(self.run_once))
            try:
                await asyncio.shield(running)
            except ServiceError as exc:
                log.warning("webhook dispatch skipped: %s", exc.message)
            except asyncio.CancelledError:
                # the thread's pass must end (after its current attempt) before the store closes
                self.stopping = True
                with suppress(Exception):
                    await running
                raise
