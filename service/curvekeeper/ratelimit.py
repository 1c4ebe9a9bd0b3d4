"""Per-key rate limiting: a token bucket for each API key id.

Each key may make ``burst`` requests at once; the bucket then refills at ``rate_per_s``
tokens a second, up to ``burst`` again. A request that finds less than one token is
refused and told how long to wait. ``rate_per_s == 0`` turns the limit off.

The buckets live in the process: with several service processes on one store each
process keeps its own, so a key's limit there is per process.

>>> now = [0.0]
>>> limiter = RateLimiter(rate_per_s=2.0, burst=2, clock=lambda: now[0])
>>> limiter.take("k_1"), limiter.take("k_1"), limiter.take("k_1")
(0.0, 0.0, 0.5)
>>> now[0] = 0.5
>>> limiter.take("k_1")
0.0
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from threading import Lock

from .config import Settings

Clock = Callable[[], float]

#: above this many buckets, full ones (keys idle long enough to have refilled) are dropped
MAX_BUCKETS = 10_000


@dataclass
class _Bucket:
    tokens: float
    at: float  # clock reading when ``tokens`` was last brought up to date


class RateLimiter:
    """Token buckets by key id; safe to share between threads.

    Parameters
    ----------
    rate_per_s : tokens added to a bucket per second, requests/s on average (0: no limit)
    burst : bucket size, requests a key may make at once (at least 1 when limiting)
    clock : monotonic seconds; tests pass a fake one
    """

    def __init__(self, rate_per_s: float, burst: int, *, clock: Clock = time.monotonic) -> None:
        if not rate_per_s >= 0:  # also refuses NaN
            raise ValueError(f"rate_limit_per_s must be 0 (off) or a positive number, not {rate_per_s}")
        if rate_per_s > 0 and burst < 1:
            raise ValueError(f"rate_limit_burst must be at least 1, not {burst}")
        self.rate_per_s = float(rate_per_s)
        self.burst = int(burst)
        self.clock = clock
        self._buckets: dict[str, _Bucket] = {}
        self._lock = Lock()

    @classmethod
    def from_settings(cls, settings: Settings, *, clock: Clock = time.monotonic) -> RateLimiter:
        return cls(settings.rate_limit_per_s, settings.rate_limit_burst, clock=clock)

    @property
    def enabled(self) -> bool:
        return self.rate_per_s > 0

    def take(self, key_id: str) -> float:
        """Spend one token of ``key_id``'s bucket: 0.0 when the request may go ahead,
        else the seconds until a token is there (nothing is spent then)."""
        if not self.enabled:
            return 0.0
        with self._lock:
            now = self.clock()
            bucket = self._buckets.get(key_id)
            if bucket is None:
                if len(self._buckets) >= MAX_BUCKETS:
                    self._prune(now)
                bucket = self._buckets[key_id] = _Bucket(float(self.burst), now)
            else:
                # max(): a clock that steps back must not drain the bucket
                elapsed = max(0.0, now - bucket.at)
                bucket.tokens = min(float(self.burst), bucket.tokens + elapsed * self.rate_per_s)
                bucket.at = now
            if bucket.tokens >= 1.0:
                bucket.tokens -= 1.0
                return 0.0
            return (1.0 - bucket.tokens) / self.rate_per_s

    def _prune(self, now: float) -> None:
        """Drop buckets that have refilled: forgetting them changes nothing."""
        full = [k for k, b in self._buckets.items()
                if b.tokens + max(0.0, now - b.at) * self.rate_per_s >= self.burst]
        for k in full:
            del self._buckets[k]
