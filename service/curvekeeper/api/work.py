"""Where a route's store work runs: on the event loop or in a worker thread.

Handing a request to a worker thread and back costs more than a small SQLite
transaction itself (measured: a single-sample ingest took 0.7 ms on the loop against
1.3 ms in a worker thread, and the whole request 1.7 against 3.2 ms). On SQLite,
small work therefore runs right on the event loop: reads never wait there (WAL), and
a write takes the write lock only if it is free at once, else it goes to a worker
thread that waits for the lock up to the busy timeout. A write holds the loop for its
whole commit, fsync included (the loop's thread waits in it, whatever the GIL does): a
batch of 1,000 samples took 6-10 ms there, every other request waiting meanwhile (a
1-value predict's p99 went from 3 to 15-27 ms while another client posted such batches;
tests/bench/ingest_bench.py), so writes stay on the loop only up to
``INLINE_MAX_WRITE_ITEMS`` samples (in a worker thread, a batch of 1,000 lost about 2 %
of its throughput side by side). Larger writes, large reads and every
PostgreSQL transaction (network round trips, row locks) run in worker threads, and so
does all work until the process's compiled kernels are built (a compilation there would
hold the loop for seconds). The size of a request is not its cost (an rls channel with a
large basis costs hundreds of times more per sample than a small one): work on the loop
has a budget that the actions spend once they know the channel (``Unit.spend``); past it
the unit rolls back before doing anything and the work runs again in a worker thread.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import TypeVar

from starlette.concurrency import run_in_threadpool

from ..actions.unit import OverBudget, Unit, Work
from ..kernels import PROCESS
from ..store import WriteLockTaken

T = TypeVar("T")

#: most samples or values a request may have to run on the event loop (about 5 ms of work)
INLINE_MAX_ITEMS = 1000
#: most samples a write may have to run on the event loop (about 1 ms with its commit)
INLINE_MAX_WRITE_ITEMS = 100
#: the cost work on the event loop may spend (``Unit.spend``: samples of a small channel)
INLINE_BUDGET = float(INLINE_MAX_ITEMS)


def _in_unit(work: Work, fn: Callable[[Unit], T], write: bool, deadline: float) -> T:
    with work.unit(write=write, deadline=deadline) as unit:
        return fn(unit)


async def run_store(work: Work, fn: Callable[[Unit], T], *, write: bool, items: int = 1,
                    started: float | None = None) -> T:
    """``fn(unit)`` in one unit of work (committed on success), on the loop when small
    enough and the store allows it, else in a worker thread. A write waits for the store's
    write lock until the busy timeout after ``started`` (``time.monotonic()``, default: now)
    at most, however long it queued for worker threads (then 503 store_busy)."""
    deadline = (time.monotonic() if started is None else started) + work.store.busy_timeout_s
    limit = INLINE_MAX_WRITE_ITEMS if write else INLINE_MAX_ITEMS
    if work.store.inline and items <= limit and PROCESS.ready:
        try:
            with work.unit(write=write, wait=False, budget=INLINE_BUDGET) as unit:
                return fn(unit)
        except (WriteLockTaken, OverBudget):
            pass
    return await run_in_threadpool(_in_unit, work, fn, write, deadline)
