"""Dependencies: the app context, and the caller's key (checked, and its rate limited,
before the body)."""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from threading import Lock
from typing import Annotated, Any

from fastapi import Depends, Header, HTTPException, Request
from starlette.concurrency import run_in_threadpool

from ..actions import keys
from ..actions.unit import Work
from ..auth import Principal, authenticate, hash_secret
from ..config import Settings
from ..errors import InvalidRequest, ServiceError
from ..kernels import KernelBuild
from ..metrics import Metrics
from ..ratelimit import RateLimiter
from ..store import Store
from ..store.tables import utcnow

log = logging.getLogger("curvekeeper.api")


@dataclass
class KeyCache:
    """Keys recently checked, by secret hash, for ``ttl`` seconds (a revocation made
    through this process takes effect at once; through another, within ``ttl``)."""

    ttl: float = 5.0
    _items: dict[str, tuple[Principal, float]] = field(default_factory=dict)
    _lock: Lock = field(default_factory=Lock)

    def get(self, digest: str) -> Principal | None:
        with self._lock:
            hit = self._items.get(digest)
            if hit is None or hit[1] < time.monotonic():
                return None
            return hit[0]

    def put(self, digest: str, who: Principal) -> None:
        with self._lock:
            if len(self._items) > 10_000:
                self._items.clear()
            self._items[digest] = (who, time.monotonic() + self.ttl)

    def clear(self) -> None:
        with self._lock:
            self._items.clear()


@dataclass
class KeyUse:
    """When each key's use may next be written: at most once per ``interval`` seconds per
    key, in this process, so a device posting every second writes its key's row once a
    minute, not on every request. ``clock`` is ``time.monotonic`` (a test may pass its own)."""

    interval: float = 60.0
    clock: Callable[[], float] = time.monotonic
    _next: dict[str, float] = field(default_factory=dict)
    _lock: Lock = field(default_factory=Lock)

    def due(self, key_id: str) -> bool:
        """True (and the next write put ``interval`` ahead) when this use should be written."""
        now = self.clock()
        with self._lock:
            if self._next.get(key_id, -math.inf) > now:
                return False
            if len(self._next) > 100_000:
                self._next.clear()
            self._next[key_id] = now + self.interval
            return True


@dataclass
class AppContext:
    settings: Settings
    store: Store
    metrics: Metrics
    keys: KeyCache
    limiter: RateLimiter
    kernels: KernelBuild
    #: units of work over the store, with the process's cache of decoded models
    work: Work
    #: when each key's last use is written next
    key_use: KeyUse = field(default_factory=KeyUse)


async def context(request: Request) -> AppContext:
    ctx: AppContext = request.app.state.ctx
    return ctx


Ctx = Annotated[AppContext, Depends(context)]


def _bearer_digest(authorization: str | None) -> str | None:
    """The hash of a well-formed bearer secret, or None (then ``authenticate`` says why)."""
    if not authorization:
        return None
    scheme, _, secret = authorization.partition(" ")
    secret = secret.strip()
    if scheme.lower() != "bearer" or not secret:
        return None
    return hash_secret(secret)


def lookup_key(ctx: AppContext, authorization: str | None) -> Principal:
    """The caller's key, from the cache or the store; raises ``Unauthorized``."""
    digest = _bearer_digest(authorization)
    if digest is not None:
        hit = ctx.keys.get(digest)
        if hit is not None:
            return hit
    with ctx.store.transaction(write=False) as repo:
        who = authenticate(repo, authorization)
    if digest is not None:
        ctx.keys.put(digest, who)
    return who


def check_rate(ctx: AppContext, who: Principal) -> None:
    """Spend one of the key's tokens, or answer 429 with ``Retry-After`` (whole seconds,
    rounded up) before the route does any work."""
    wait = ctx.limiter.take(who.key_id)
    if wait > 0:
        seconds = max(1, math.ceil(wait))
        # an HTTPException: the one error handler turns it into the contract's body with
        # code rate_limited and keeps its headers
        raise HTTPException(429, f"too many requests with this api key; retry in {seconds} s",
                            headers={"Retry-After": str(seconds)})


def record_use(ctx: AppContext, key_id: str) -> None:
    """Write the key's last use now; a busy store only delays it to the next due use."""
    try:
        with ctx.store.transaction(write=True, deadline=time.monotonic() + USE_WAIT_S) as repo:
            keys.record_use(repo, key_id, utcnow())
    except ServiceError as exc:
        log.info("last use of key %s not recorded: %s", key_id, exc.message)


#: how long recording a key's use may wait for the store's write lock (SQLite), seconds
USE_WAIT_S = 0.5


async def principal(ctx: Ctx, authorization: Annotated[str | None, Header()] = None) -> Principal:
    # async, so a cached key costs no trip through the thread pool (but once a minute, to
    # record the key's use)
    digest = _bearer_digest(authorization)
    hit = ctx.keys.get(digest) if digest is not None else None
    who = hit if hit is not None else await run_in_threadpool(lookup_key, ctx, authorization)
    if ctx.key_use.due(who.key_id):
        await run_in_threadpool(record_use, ctx, who.key_id)
    check_rate(ctx, who)
    return who


Who = Annotated[Principal, Depends(principal)]


def check_times(samples: Sequence[Any], settings: Settings) -> None:
    """No sample's ``t`` is more than ``max_clock_skew_s`` ahead of this server's clock: a
    time from a clock gone wrong would otherwise become the channel's ``last_sample_at``."""
    latest = datetime.now(UTC) + timedelta(seconds=settings.max_clock_skew_s)
    for i, s in enumerate(samples):
        if s.t is not None and s.t > latest:
            raise InvalidRequest(f"sample {i}: t is more than {settings.max_clock_skew_s:g} s ahead of the "
                                 "server's clock", details={"index": i, "field": "t"})
