"""The unit of work: one request's transaction, the models it reads and writes, and what
happens once it has committed.

``Work`` belongs to the process: it holds the store and the cache of decoded models.
``Work.unit(write=...)`` opens one transaction and yields a ``Unit``; the actions read and
write SQL through ``unit.repo`` and models through ``unit.read_model`` /
``unit.write_model`` / ``unit.save_model``. Nothing commits but the unit's end, and a
model saved in a transaction enters the cache only once that transaction has committed.
"""

from __future__ import annotations

import asyncio
import math
from collections import OrderedDict
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress
from datetime import datetime
from threading import Lock
from typing import Any, TypeVar

from ..core import ChannelModel, StateError
from ..errors import StateDamaged
from ..store import Repository, Store
from ..store.repository import LearningState
from ..store.tables import ChannelState, utcnow

T = TypeVar("T")

#: decoded models a process keeps (about 5 KB each)
CACHE_SIZE = 4096


class ModelCache:
    """Decoded models by channel, each tagged with the channel's version.

    Versions only grow, so an entry is either exactly the stored state or stale (and then
    never asked for again): the cache stays coherent with several processes on one store.
    """

    def __init__(self, size: int = CACHE_SIZE) -> None:
        self.size = size
        self._items: OrderedDict[int, tuple[int, ChannelModel]] = OrderedDict()
        self._lock = Lock()
        #: channels whose stored state this process could not restore, with that state's version
        self.damaged: dict[int, int] = {}

    def get(self, channel_pk: int, version: int) -> ChannelModel | None:
        with self._lock:
            hit = self._items.get(channel_pk)
            if hit is None or hit[0] != version:
                return None
            self._items.move_to_end(channel_pk)
            return hit[1]

    def put(self, channel_pk: int, version: int, model: ChannelModel) -> None:
        with self._lock:
            old = self._items.get(channel_pk)
            if old is not None and old[0] > version:
                return
            if self.damaged.get(channel_pk, version) < version:
                del self.damaged[channel_pk]  # a newer state replaced the damaged one
            self._items[channel_pk] = (version, model)
            self._items.move_to_end(channel_pk)
            while len(self._items) > self.size:
                self._items.popitem(last=False)

    def clear(self) -> None:
        with self._lock:
            self._items.clear()


def summary_columns(model: ChannelModel) -> dict[str, Any]:
    """The denormalised summary the list filters and the counts by state use, from a model."""
    return {"drift_state": model.drift_state, "tolerance_state": model.tolerance_state, "rmse": model.rmse,
            "service_state": model.service}


def restore(config: dict[str, Any], state: dict[str, Any], what: str) -> ChannelModel:
    """A model from stored config and state; a state the core refuses is the store's
    fault (``StateDamaged``), never the client's."""
    try:
        return ChannelModel.from_state(config, state)
    except StateError as exc:
        raise damaged(exc, what) from exc


def damaged(exc: StateError, what: str, way_out: str | None = None) -> StateDamaged:
    """The service's error for a state of ``what`` the core refused with ``exc``."""
    message = f"the stored state of {what} cannot be restored; it has been logged"
    return StateDamaged(f"{message}. {way_out}" if way_out else message, details={"reason": exc.message})


def rollback_hint(channel_id: str) -> str:
    """The way out of a channel whose stored state is damaged: a rollback to a snapshot."""
    return (f"Roll the channel back to a snapshot: POST /v1/channels/{channel_id}/rollback with "
            f'{{"snapshot": <id>}} (GET /v1/channels/{channel_id}/snapshots lists them)')


class OverBudget(Exception):
    """``Unit.spend`` found the work costlier than the unit's budget; raised before the work
    is done, so the transaction rolls back with nothing changed: run it again elsewhere."""


def item_cost(model: ChannelModel) -> float:
    """The cost of learning one sample on ``model``, in samples of a small channel: an rls
    update costs M*M (its covariance), an sgd update M (M: basis terms)."""
    m = model.basis.size
    return 1.0 + (m * m if model.config["learner"]["kind"] == "rls" else m) / 64.0


class Unit:
    """One transaction's work: ``repo`` for SQL, the process's models, and steps to run
    once the transaction has committed (never if it rolls back). ``budget``: the cost the
    unit may still ``spend`` (units of ``item_cost``), finite for work on the event loop."""

    def __init__(self, repo: Repository, models: ModelCache, budget: float = math.inf,
                 clock: Callable[[], datetime] = utcnow) -> None:
        self.repo = repo
        self.models = models
        self.budget = budget
        #: the time now (aware UTC): the receipt of samples, the silence watch
        self.now = clock
        self._after: list[Callable[[], None]] = []

    def spend(self, cost: float) -> None:
        """Account for work about to be done; raises ``OverBudget`` beyond the budget."""
        self.budget -= cost
        if self.budget < 0:
            raise OverBudget()

    def after_commit(self, step: Callable[[], None]) -> None:
        self._after.append(step)

    def read_model(self, st: ChannelState | LearningState) -> ChannelModel:
        """The channel's current model, shared: read it, never change it."""
        model = self.models.get(st.channel_pk, st.version)
        if model is None:
            config, state = self.repo.config_and_state(st.channel_pk)
            try:
                model = ChannelModel.from_state(config, state)
            except StateError as exc:
                self.models.damaged[st.channel_pk] = st.version
                # named by its id, looked up only now that it is needed
                channel_id = self.repo.channel_id(st.channel_pk)
                raise damaged(exc, f"channel {channel_id!r}", rollback_hint(channel_id)) from exc
            self.models.put(st.channel_pk, st.version, model)
        return model

    def write_model(self, st: ChannelState | LearningState) -> ChannelModel:
        """A private copy of the channel's current model, to change and then ``save_model``."""
        return self.read_model(st).copy()

    def save_model(self, st: ChannelState | LearningState, model: ChannelModel, version: int,
                   **columns: Any) -> None:
        """Write the model as the channel's state at ``version`` (one UPDATE); once the
        transaction commits, the cache holds it."""
        self.repo.save_state(st, model_state=model.to_state(), version=version, **summary_columns(model),
                             **columns)
        pk = st.channel_pk
        self.after_commit(lambda: self.models.put(pk, version, model))


class Work:
    """The process's way into the store: opens units of work over one model cache."""

    def __init__(self, store: Store, models: ModelCache | None = None,
                 clock: Callable[[], datetime] = utcnow) -> None:
        self.store = store
        self.models = models if models is not None else ModelCache()
        #: aware UTC time now (tests pass a clock they move)
        self.clock = clock

    @contextmanager
    def unit(self, *, write: bool, wait: bool = True, budget: float = math.inf,
             deadline: float | None = None) -> Iterator[Unit]:
        """One transaction (see ``Store.transaction``): committed when the block ends
        without an error, rolled back otherwise; the unit's after-commit steps then run."""
        with self.store.transaction(write=write, wait=wait, deadline=deadline) as repo:
            unit = Unit(repo, self.models, budget, self.clock)
            yield unit
        for step in unit._after:
            step()

    def in_batches(self, step: Callable[[Repository, datetime], int], batch: int) -> int:
        """Run ``step(repo, now)`` (it handles up to ``batch`` items and says how many) in one
        write unit after another until one handles fewer than ``batch``; how many in all.
        The periodic sweeps run so: a short transaction each, whatever is waiting."""
        total = 0
        while True:
            with self.unit(write=True) as unit:
                n = step(unit.repo, unit.now())
            total += n
            if n < batch:
                return total


async def in_thread_to_end(fn: Callable[[], T]) -> T:
    """``fn()`` in a worker thread, for the service's periodic tasks. Cancelled meanwhile (the
    service stopping), it waits for the thread to finish before the cancellation goes on, so
    the store is never closed under a pass still holding one of its connections."""
    running = asyncio.ensure_future(asyncio.to_thread(fn))
    try:
        return await asyncio.shield(running)
    except asyncio.CancelledError:
        with suppress(Exception):
            await running
        raise
