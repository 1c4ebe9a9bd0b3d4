"""Dependencies: the app context, and the caller's key (checked, and its rate limited,
before the body)."""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from threading import Lock
from typing import Annotated, Any

from fastapi import Depends, Header, HTTPException, Request
from starlette.concurrency import run_in_threadpool

from ..actions.unit import Work
from ..auth import Principal, authenticate, hash_secret
from ..config import Settings
from ..errors import InvalidRequest
from ..kernels import KernelBuild
from ..metrics import Metrics
from ..ratelimit import RateLimiter
from ..store import Store


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
class AppContext:
    settings: Settings
    store: Store
    metrics: Metrics
    keys: KeyCache
    limiter: RateLimiter
    kernels: KernelBuild
    #: units of work over the store, with the process's cache of decoded models
    work: Work


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


async def principal(ctx: Ctx, authorization: Annotated[str | None, Header()] = None) -> Principal:
    # async, so a cached key costs no trip through the thread pool
    digest = _bearer_digest(authorization)
    hit = ctx.keys.get(digest) if digest is not None else None
    who = hit if hit is not None else await run_in_threadpool(lookup_key, ctx, authorization)
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
