"""The unit of work: a model saved in a transaction enters the process's cache only once
that transaction has committed; a rolled-back one leaves the cache and its after-commit
steps alone; a state the core cannot restore is the store's fault."""

from __future__ import annotations

import asyncio
import shutil
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper.actions import channels, samples
from curvekeeper.actions.unit import ModelCache, Work, in_thread_to_end
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel
from curvekeeper.errors import StateDamaged
from curvekeeper.store import Store
from curvekeeper.store.tables import ChannelState
from sqlalchemy import update

from tests.conftest import LINEAR


class Sample:
    def __init__(self, x: float, y: float) -> None:
        self.x, self.y, self.t, self.seq = x, y, None, None


@pytest.fixture
def work(tmp_path: Path, sqlite_template: Path) -> Any:
    path = tmp_path / "store.db"
    shutil.copyfile(sqlite_template, path)
    store = Store(f"sqlite:///{path}")
    w = Work(store)
    with w.unit(write=True) as unit:
        channels.create(unit.repo, {"id": "u.c1", **LINEAR}, key_id="test")
    yield w
    store.dispose()


def _pk_version(work: Work) -> tuple[int, int]:
    with work.unit(write=False) as unit:
        st = unit.repo.learning_state("u.c1", lock=False)
        assert st is not None
        return st.channel_pk, st.version


def test_a_saved_model_enters_the_cache_only_after_commit(work: Work) -> None:
    pk, v0 = _pk_version(work)
    with work.unit(write=True) as unit:
        samples.ingest(unit, "u.c1", [Sample(10.0, 1.0)], None, None)
        assert work.models.get(pk, v0 + 1) is None, "cached before the commit"
    cached = work.models.get(pk, v0 + 1)
    assert cached is not None
    with work.unit(write=False) as unit:
        st = unit.repo.learning_state("u.c1", lock=False)
        assert st is not None and st.version == v0 + 1
        assert unit.read_model(st) is cached


def test_a_rolled_back_unit_caches_nothing_and_runs_no_after_commit_step(work: Work) -> None:
    pk, v0 = _pk_version(work)
    ran: list[str] = []
    with pytest.raises(RuntimeError), work.unit(write=True) as unit:
        samples.ingest(unit, "u.c1", [Sample(10.0, 1.0)], None, None)
        unit.after_commit(lambda: ran.append("step"))
        raise RuntimeError("fails after the learning")
    assert ran == []
    assert work.models.get(pk, v0 + 1) is None
    assert _pk_version(work) == (pk, v0), "the rolled-back learning was stored"


def test_a_state_the_core_cannot_restore_is_state_damaged(work: Work) -> None:
    pk, _ = _pk_version(work)
    with work.unit(write=True) as unit:
        unit.repo.session.execute(update(ChannelState).where(ChannelState.channel_pk == pk)
                                  .values(model_state={"format": 999}, version=ChannelState.version + 1))
    with pytest.raises(StateDamaged) as err, work.unit(write=False) as unit:
        channels.get(unit, "u.c1")
    assert err.value.code == "state_damaged"
    # the way out, named with the channel's id
    assert "POST /v1/channels/u.c1/rollback" in err.value.message
    assert work.models.get(pk, _pk_version(work)[1]) is None  # nothing cached


def _model() -> ChannelModel:
    return ChannelModel.from_config(channel_config({"id": "u.c1", **LINEAR}))


def test_the_cache_keeps_the_newest_version_and_evicts_the_least_recent() -> None:
    cache = ModelCache(size=2)
    a, b, c = _model(), _model(), _model()
    cache.put(1, 5, a)
    cache.put(1, 4, b)  # an older version never replaces a newer one
    assert cache.get(1, 5) is a and cache.get(1, 4) is None
    cache.put(2, 1, b)
    cache.get(1, 5)  # channel 1 is now the most recent
    cache.put(3, 1, c)
    assert cache.get(2, 1) is None and cache.get(1, 5) is a and cache.get(3, 1) is c
    assert np.array_equal(cache.get(1, 5).weights, a.weights)  # type: ignore[union-attr]


def test_a_cancelled_background_pass_ends_its_thread_before_the_cancellation_goes_on() -> None:
    """The service's periodic passes (sweeps, the event feed) run in worker threads; when the
    service stops, the cancelled task waits for its pass to finish, so the store is not
    closed under a connection the pass still holds."""
    started, release, finished = threading.Event(), threading.Event(), threading.Event()

    def a_pass() -> int:
        started.set()
        release.wait(30)
        finished.set()
        return 1

    async def main() -> None:
        task = asyncio.create_task(in_thread_to_end(a_pass))
        assert await asyncio.to_thread(started.wait, 30)
        task.cancel()
        for _ in range(5):
            await asyncio.sleep(0.01)
        assert not task.done()  # still waiting for the thread
        release.set()
        with pytest.raises(asyncio.CancelledError):
            await task
        assert finished.is_set()

    asyncio.run(main())
