"""The silence watch: a channel with ``expected_interval`` (seconds) is ``stale`` once no
sample has been received for ``STALE_FACTOR`` times that interval.

No timer per channel. The state row keeps ``silent_since`` (the latest sample's receipt,
or the channel's creation or unarchiving, when later) and ``stale_after`` (silent_since +
3 expected_interval; null when not watched or archived). A read compares ``stale_after``
with the clock, so answers, the list's ``?state=stale`` and the counts by state are exact
at any moment. The ``stale`` event is written once per silence, by whichever comes first:
the periodic ``sweep`` (one conditional UPDATE, safe with several processes on one store)
or the sample that ends the silence; ``stale_since`` on the row records it. The next sample
clears the state with ``stale_cleared``; so does a change of ``expected_interval`` that no
longer makes the channel stale, and archiving (an archived channel is not watched).
Receipt, not the sample's measurement time ``t``: a device that sends old readings late is
still talking.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Awaitable, Callable
from datetime import datetime, timedelta
from functools import partial
from typing import Any

from ..errors import ServiceError
from ..store import Repository
from ..store.repository import LearningState
from ..store.tables import ChannelState
from . import duewatch
from .unit import Work, in_thread_to_end

log = logging.getLogger("curvekeeper.stale")

#: a channel is stale after this many expected intervals without a sample
STALE_FACTOR = 3
#: channels one sweep transaction marks at most (the next transaction takes the rest)
SWEEP_BATCH = 500


def deadline(config: dict[str, Any], silent_since: datetime | None) -> datetime | None:
    """When a channel silent since ``silent_since`` becomes stale; None when not watched."""
    interval = config.get("expected_interval")
    if interval is None or silent_since is None:
        return None
    return silent_since + timedelta(seconds=STALE_FACTOR * float(interval))


def is_stale(stale_after: datetime | None, now: datetime) -> bool:
    return stale_after is not None and stale_after <= now


def status(st: ChannelState | LearningState, now: datetime) -> dict[str, Any]:
    """``stale`` and ``stale_since`` as a channel answers them."""
    stale = is_stale(st.stale_after, now)
    return {"stale": stale, "stale_since": st.stale_after if stale else None}


def _event(kind: str, pk: int, version: int, now: datetime, key_id: str | None, **details: Any) -> dict[str, Any]:
    return {"channel_pk": pk, "kind": kind, "version": version, "key_id": key_id, "at": now,
            "details": {k: v.isoformat() if isinstance(v, datetime) else v for k, v in details.items()}}


def on_samples(st: LearningState, config: dict[str, Any], now: datetime, *, sample_seq: int, measured_at: datetime,
               version: int, key_id: str | None) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """Samples received ``now`` end any silence: the state row's new watch columns and the
    events (``stale``, when no sweep wrote it yet, then ``stale_cleared``)."""
    values: dict[str, Any] = {"silent_since": now, "stale_after": deadline(config, now)}
    events: list[dict[str, Any]] = []
    if st.stale_since is None and is_stale(st.stale_after, now):
        events.append(_event("stale", st.channel_pk, version - 1, now, None, stale_since=st.stale_after,
                             noticed_by="sample"))
    if st.stale_since is not None or events:
        values["stale_since"] = None
        events.append(_event("stale_cleared", st.channel_pk, version, now, key_id, stale_since=st.stale_after,
                             reason="sample", sample_seq=sample_seq, measured_at=measured_at))
    return values, events


def rewatch(repo: Repository, st: ChannelState, config: dict[str, Any], now: datetime, *, reason: str,
            key_id: str | None, silent_since: datetime | None = None, archived: bool = False) -> None:
    """Set the watch after a change of ``expected_interval`` (``reason`` settings_changed),
    archiving (not watched) or unarchiving (``silent_since`` now). A channel marked stale
    that no longer is gets ``stale_cleared``; one that became stale by the change is marked
    by the next sweep."""
    since = silent_since or st.silent_since or now
    after = None if archived else deadline(config, since)
    values: dict[str, Any] = {"silent_since": since, "stale_after": after}
    if st.stale_since is not None and not is_stale(after, now):
        values["stale_since"] = None
        repo.insert_events([_event("stale_cleared", st.channel_pk, st.version, now, key_id,
                                   stale_since=st.stale_since, reason=reason)])
    if any(getattr(st, k) != v for k, v in values.items()):
        repo.save_due(st, **values)


def sweep(repo: Repository, now: datetime, limit: int = SWEEP_BATCH) -> int:
    """Mark up to ``limit`` channels stale at ``now`` and write their ``stale`` events;
    how many. Running it again at once marks none: each silence gets one event."""
    rows = repo.mark_stale(now, limit)
    repo.insert_events([_event("stale", pk, version, now, None, stale_since=after, silent_since=silent,
                               noticed_by="sweep") for pk, after, version, silent in rows])
    return len(rows)


def sweep_all(work: Work) -> int:
    """Sweep until nothing is left, one transaction per ``SWEEP_BATCH`` channels."""
    return work.in_batches(sweep, SWEEP_BATCH)


async def sweep_forever(work: Work, interval_s: float,
                        sleep: Callable[[float], Awaitable[None]] = asyncio.sleep) -> None:
    """The service's sweep: every ``interval_s`` seconds, in a worker thread (the store may
    wait on a lock or the network), the silence watch and then the due watch
    (``actions.duewatch``). A busy store only delays them to the next round."""
    while True:
        await sleep(interval_s)
        for name, run in (("became stale", sweep_all), ("came due or overdue", duewatch.sweep_all)):
            try:
                n = await in_thread_to_end(partial(run, work))
                if n:
                    log.info("%d channel(s) %s", n, name)
            except ServiceError as exc:
                log.warning("sweep skipped (%s): %s", name, exc.message)
