"""Where store work runs (service/curvekeeper/api/work.py): small requests on SQLite run on the
event loop and take the write lock only when it is free; when another writer holds it
they wait in a worker thread, and past the busy timeout they answer 503 with nothing
stored."""

from __future__ import annotations

import asyncio
import sqlite3
import threading
from collections.abc import Iterator

import pytest
from curvekeeper.actions.unit import Work
from curvekeeper.api.app import create_app
from curvekeeper.api.work import INLINE_MAX_ITEMS, INLINE_MAX_WRITE_ITEMS, run_store
from curvekeeper.config import Settings
from curvekeeper.kernels import PROCESS
from curvekeeper.store import Store, WriteLockTaken
from fastapi.testclient import TestClient

from tests.conftest import ADMIN_SECRET, LINEAR, auth, store_fingerprint

ADMIN = auth(ADMIN_SECRET)


def sqlite_file(url: str) -> str:
    return url.removeprefix("sqlite:///")


# the write lock without waiting is SQLite's (PostgreSQL work always runs in worker threads)
sqlite_only = pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)


@pytest.fixture
def held(database_url: str) -> Iterator[sqlite3.Connection]:
    """Another connection that can hold the store's write lock."""
    conn = sqlite3.connect(sqlite_file(database_url), isolation_level=None, check_same_thread=False)
    yield conn
    conn.close()


@sqlite_only
def test_store_write_without_waiting_raises_while_the_lock_is_held(database_url: str,
                                                                   held: sqlite3.Connection) -> None:
    store = Store(database_url, busy_timeout_s=5.0)
    try:
        held.execute("BEGIN IMMEDIATE")
        with pytest.raises(WriteLockTaken), store.transaction(write=True, wait=False) as repo:
            assert repo.channel_and_state("nowhere") is None
        held.execute("ROLLBACK")
        with store.transaction(write=True, wait=False) as repo:  # free again: taken at once
            assert repo.channel_and_state("nowhere") is None
    finally:
        store.dispose()


def test_postgres_store_is_never_inline(database_url: str) -> None:
    store = Store(database_url)
    try:
        assert store.inline == database_url.startswith("sqlite")
    finally:
        store.dispose()


@sqlite_only
def test_ingest_waits_for_a_writer_elsewhere_then_succeeds(database_url: str, held: sqlite3.Connection) -> None:
    app = create_app(Settings(database_url=database_url, admin_key=ADMIN_SECRET, webhook_dispatch_s=0.0))
    with TestClient(app) as client:
        assert client.post("/v1/channels", json={"id": "site-a.w1", **LINEAR}, headers=ADMIN).status_code == 201
        bench = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 26.0}, {"x": 100.0, "y": 51.2}]}
        assert client.post("/v1/channels/site-a.w1/calibrate", json=bench, headers=ADMIN).status_code == 200
        held.execute("BEGIN IMMEDIATE")
        answers: list[int] = []
        poster = threading.Thread(target=lambda: answers.append(client.post(
            "/v1/channels/site-a.w1/samples", json={"samples": [{"x": 1.0, "y": 2.0}]}, headers=ADMIN).status_code))
        poster.start()
        poster.join(0.5)
        assert poster.is_alive() and not answers, "the request must wait for the lock, not fail or skip it"
        held.execute("ROLLBACK")
        poster.join(10)
        assert answers == [200]
        got = client.get("/v1/channels/site-a.w1", headers=ADMIN).json()
        assert got["n_samples"] == 1


@sqlite_only
def test_ingest_answers_503_and_stores_nothing_past_the_busy_timeout(database_url: str,
                                                                     held: sqlite3.Connection) -> None:
    settings = Settings(database_url=database_url, admin_key=ADMIN_SECRET, busy_timeout_s=0.2, webhook_dispatch_s=0.0)
    with TestClient(create_app(settings)) as client:
        assert client.post("/v1/channels", json={"id": "site-a.w1", **LINEAR}, headers=ADMIN).status_code == 201
        before = store_fingerprint(client)
        held.execute("BEGIN IMMEDIATE")
        try:
            r = client.post("/v1/channels/site-a.w1/samples", json={"samples": [{"x": 1.0, "y": 2.0}]},
                            headers=ADMIN)
        finally:
            held.execute("ROLLBACK")
        assert r.status_code == 503
        assert r.json()["error"]["code"] == "store_busy"
        assert r.headers["Retry-After"]
        assert store_fingerprint(client) == before


@sqlite_only
def test_predict_reads_while_a_writer_holds_the_lock(database_url: str, held: sqlite3.Connection) -> None:
    app = create_app(Settings(database_url=database_url, admin_key=ADMIN_SECRET, webhook_dispatch_s=0.0))
    with TestClient(app) as client:
        assert client.post("/v1/channels", json={"id": "site-a.w1", **LINEAR}, headers=ADMIN).status_code == 201
        bench = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 26.0}, {"x": 100.0, "y": 51.2}]}
        assert client.post("/v1/channels/site-a.w1/calibrate", json=bench, headers=ADMIN).status_code == 200
        held.execute("BEGIN IMMEDIATE")
        try:
            r = client.post("/v1/channels/site-a.w1/predict", json={"x": [1.0, 2.0]}, headers=ADMIN)
        finally:
            held.execute("ROLLBACK")
        assert r.status_code == 200
        assert len(r.json()["y"]) == 2


def test_large_batches_run_in_a_worker_thread_and_learn_in_order(client: TestClient) -> None:
    assert client.post("/v1/channels", json={"id": "site-a.w2", **LINEAR}, headers=ADMIN).status_code == 201
    samples = [{"x": float(i % 100), "y": 0.5 * (i % 100) + 3.0, "seq": i} for i in range(2500)]
    r = client.post("/v1/channels/site-a.w2/samples", json={"source": "gw", "samples": samples}, headers=ADMIN)
    assert r.status_code == 200, r.text
    out = r.json()
    assert out["n_samples"] == 2500 and out["accepted"] + len(out["rejected"]) == 2500
    again = client.post("/v1/channels/site-a.w2/samples", json={"source": "gw", "samples": samples[:5]},
                        headers=ADMIN)
    assert again.json()["duplicates"] == 5



@sqlite_only
@pytest.mark.parametrize(("write", "items", "on_loop"), [
    (True, 1, True), (True, INLINE_MAX_WRITE_ITEMS, True), (True, INLINE_MAX_WRITE_ITEMS + 1, False),
    (True, INLINE_MAX_ITEMS, False), (False, INLINE_MAX_ITEMS, True), (False, INLINE_MAX_ITEMS + 1, False)])
def test_writes_leave_the_loop_sooner_than_reads(database_url: str, write: bool, items: int, on_loop: bool) -> None:
    """A write holds the loop through its commit's fsync: past ``INLINE_MAX_WRITE_ITEMS``
    samples it runs in a worker thread, where a read of the same size still runs on the loop."""
    PROCESS.start()  # once per process: the kernels must be built for work to run on the loop
    assert PROCESS.wait(120), PROCESS.error
    store = Store(database_url)
    try:
        async def where() -> tuple[int, int]:
            ran = await run_store(Work(store), lambda unit: threading.get_ident(), write=write, items=items)
            return ran, threading.get_ident()

        ran, loop = asyncio.run(where())
        assert (ran == loop) is on_loop
    finally:
        store.dispose()
