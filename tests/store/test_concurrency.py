"""Two ``curvekeeper serve`` processes on one store (a SQLite file shared through SQLite's
file locks; PostgreSQL when CURVEKEEPER_TEST_DATABASE_URL is set) and a pool of threads
writing to one shared channel and to their own channels through both, with single-channel
posts and gateway batches across channels.

Counts must be exact, no request may fail with a 500 (a busy store answers 503 with
Retry-After, which the client retries), and every channel's stored state must equal a
sequential replay of its log in commit order (``curvekeeper replay --check``)."""

from __future__ import annotations

import random
import shutil
import sqlite3
import threading
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from curvekeeper.actions import keys as keys_actions
from curvekeeper.client import Client, ClientError
from curvekeeper.store import Repository, Store, migrate
from curvekeeper.store.engine import make_engine
from curvekeeper.store.tables import ApiKey
from sqlalchemy import Engine, create_engine, text

from tests.conftest import LINEAR, empty_postgres, fresh_store
from tests.store.servers import ADMIN, Server, assert_exactly_once, assert_replays

THREADS = 8
ROUNDS = 30
SHARED = "conc.shared"
BUSY_S = 0.05


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path, sqlite_template: Path) -> str:
    return fresh_store(request, tmp_path, sqlite_template)


@pytest.fixture
def servers(store_url: str, tmp_path: Path) -> Iterator[list[Server]]:
    """Two servers on the store. On SQLite a writer waits at most BUSY_S for the file's
    write lock before answering 503, so the busy path is taken under this load."""
    env = {"CURVEKEEPER_BUSY_TIMEOUT_S": str(BUSY_S)} if store_url.startswith("sqlite") else {}
    started: list[Server] = []
    try:
        for name in ("a", "b"):
            s = Server(store_url, tmp_path, name=name, env=env)
            started.append(s)
            s.start()
        yield started
    finally:
        for s in started:
            s.stop()


class Writer:
    """One thread: ROUNDS requests, each through a random one of the two servers: a post to
    the shared channel, to its own channel, or a gateway batch over the shared channel, its
    own and its neighbour's. Counts what the answers say was stored, per channel."""

    def __init__(self, i: int, urls: list[str]) -> None:
        self.name = f"t{i}"
        self.own = f"conc.{self.name}"
        self.neighbour = f"conc.t{(i + 1) % THREADS}"
        self.rng = random.Random(1000 + i)
        self.clients = [Client(u, ADMIN, seed=i, max_retries=30, backoff=0.05, max_backoff=1.0) for u in urls]
        self.stored: Counter[str] = Counter()
        self.acked: set[tuple[str, str | None, int | None]] = set()
        self.sent: set[tuple[str, str | None, int | None]] = set()
        self.errors: list[str] = []
        self.seq = 0

    def run(self) -> None:
        try:
            for _ in range(ROUNDS):
                self._one()
        except BaseException as exc:  # reported by the test
            self.errors.append(repr(exc))
        finally:
            for c in self.clients:
                c.close()

    def _one(self) -> None:
        client = self.rng.choice(self.clients)
        pick = self.rng.random()
        n = self.rng.randint(1, 8)
        if pick < 0.35:
            channels = [SHARED] * n
        elif pick < 0.7:
            channels = [self.own] * n
        else:
            channels = [self.rng.choice((SHARED, self.own, self.neighbour)) for _ in range(n)]
        batch: list[dict[str, Any]] = []
        for ch in channels:
            self.seq += 1
            x = self.rng.uniform(0.0, 100.0)
            # now and then a wild reference value: stored, counted, but rejected by the gate
            y = 2.0 * x + 1.0 + (self.rng.gauss(0.0, 0.5) if self.rng.random() > 0.05 else 500.0)
            batch.append({"channel": ch, "x": x, "y": y, "seq": self.seq})
        triples = {(s["channel"], self.name, s["seq"]) for s in batch}
        self.sent |= triples
        try:
            if pick < 0.7:
                out = client.post_samples(channels[0], [{k: v for k, v in s.items() if k != "channel"}
                                                        for s in batch], source=self.name)
                self.stored[channels[0]] += out["accepted"] + len(out["rejected"])
            else:
                out = client.post_gateway(batch, source=self.name)
                assert set(out["channels"]) == set(channels)
                self.stored.update(channels)
                assert out["accepted"] + len(out["rejected"]) == n
        except ClientError as exc:
            self.errors.append(str(exc))
            return
        assert out["duplicates"] == 0, out
        self.acked |= triples


class Technician:
    """Meanwhile, on the shared channel: a snapshot through one server, and now and then a
    rollback to a random earlier snapshot through the other."""

    def __init__(self, urls: list[str]) -> None:
        self.rng = random.Random(99)
        self.clients = [Client(u, ADMIN, seed=99, max_retries=30, backoff=0.05, max_backoff=1.0) for u in urls]
        self.rollbacks = 0
        self.errors: list[str] = []

    def run(self) -> None:
        known: list[int] = []
        try:
            for i in range(ROUNDS // 2):
                first, second = self.rng.sample(self.clients, 2)
                known.append(first.take_snapshot(SHARED, label=f"round {i}")["id"])
                if self.rng.random() < 0.6:
                    out = second.rollback(SHARED, self.rng.choice(known))
                    known.append(out["snapshot_before"])
                    self.rollbacks += 1
        except BaseException as exc:  # reported by the test
            self.errors.append(repr(exc))
        finally:
            for c in self.clients:
                c.close()


@pytest.mark.slow
def test_two_servers_and_many_threads_count_exactly_and_replay(servers: list[Server], store_url: str) -> None:
    writers = [Writer(i, [s.url for s in servers]) for i in range(THREADS)]
    with Client(servers[0].url, ADMIN) as admin:
        for ch in [SHARED, *(w.own for w in writers)]:
            admin.create_channel({"id": ch, **LINEAR, "snapshot_every": 50})
    tech = Technician([s.url for s in servers])
    everyone: list[Writer | Technician] = [*writers, tech]
    threads = [threading.Thread(target=w.run, daemon=True) for w in everyone]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads), "a thread did not finish"
    errors = [e for w in everyone for e in w.errors]
    assert not errors, errors[:5]

    expected: Counter[str] = Counter()
    for w in writers:
        expected.update(w.stored)
    with Client(servers[1].url, ADMIN) as admin:
        seen = {ch: admin.get_channel(ch)["n_samples"] for ch in expected}
        # each sample and each rollback is one version of the shared channel
        assert admin.get_channel(SHARED)["version"] == expected[SHARED] + tech.rollbacks
    assert seen == dict(expected)
    counts = assert_exactly_once(store_url, set().union(*(w.acked for w in writers)),
                                 set().union(*(w.sent for w in writers)))
    assert counts == dict(expected)
    retries = sum(c.retries for w in everyone for c in w.clients)
    print(f"{sum(counts.values())} samples over {len(counts)} channels, {tech.rollbacks} rollbacks; "
          f"{retries} retries")
    for s in servers:
        assert not s.internal_errors(), s.internal_errors()[:5]
    assert_replays(store_url, counts)


@pytest.mark.slow
def test_a_locked_sqlite_store_answers_503_and_the_retry_stores_once(tmp_path: Path,
                                                                     sqlite_template: Path) -> None:
    """An exclusive lock held from outside (a backup tool, a long migration) makes a write
    wait the busy timeout (0.2 s here) and answer 503 ``store_busy`` with Retry-After,
    leaving nothing stored; once the lock is gone, the client's retry is stored once."""
    path = tmp_path / "store.db"
    shutil.copyfile(sqlite_template, path)
    url = f"sqlite:///{path}"
    server = Server(url, tmp_path, env={"CURVEKEEPER_BUSY_TIMEOUT_S": "0.2"})
    server.start()
    channel = "busy.c1"
    batch = [{"x": float(i), "y": 2.0 * i + 1.0, "seq": i} for i in range(1, 6)]
    lock = sqlite3.connect(path, isolation_level=None, timeout=5)
    try:
        with Client(server.url, ADMIN) as admin:
            admin.create_channel({"id": channel, **LINEAR})
        lock.execute("BEGIN EXCLUSIVE")
        r = httpx.post(f"{server.url}/v1/channels/{channel}/samples", json={"source": "dev", "samples": batch},
                       headers={"Authorization": f"Bearer {ADMIN}"}, timeout=10)
        assert r.status_code == 503, r.text
        hint = int(r.headers["Retry-After"])
        assert hint >= 1
        body = r.json()
        assert set(body) == {"error"} and set(body["error"]) == {"code", "message", "details"}
        assert body["error"]["code"] == "store_busy" and body["error"]["message"]
        # nothing half-stored (seen through the connection that holds the lock)
        assert lock.execute("SELECT count(*) FROM sample").fetchone() == (0,)
        assert lock.execute("SELECT n_samples, version FROM channel_state").fetchone() == (0, 0)

        waits: list[float] = []

        def release_then_retry(seconds: float) -> None:
            waits.append(seconds)
            if lock.in_transaction:
                lock.execute("COMMIT")

        with Client(server.url, ADMIN, sleep=release_then_retry, max_retries=3) as c:
            out = c.post_samples(channel, batch, source="dev")
        assert (out["accepted"], out["duplicates"], out["n_samples"]) == (5, 0, 5)
        assert len(waits) == 1 and waits[0] >= hint
    finally:
        if lock.in_transaction:
            lock.execute("ROLLBACK")
        lock.close()
        server.stop()
    assert_exactly_once(url, {(channel, "dev", i) for i in range(1, 6)}, {(channel, "dev", i) for i in range(1, 6)})
    assert not server.internal_errors()
    assert_replays(url, [channel])


@pytest.fixture(params=["sqlite", "postgresql"])
def empty_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A store with no tables at all (PostgreSQL: the test database's schema dropped; the
    session's ``postgres_url`` migrates it again for later tests only at session start,
    so this fixture migrates it back afterwards)."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'empty.db'}"
    url: str = request.getfixturevalue("postgres_url")
    drop = create_engine(url)
    with drop.begin() as conn:
        conn.execute(text("DROP SCHEMA public CASCADE"))
        conn.execute(text("CREATE SCHEMA public"))
    drop.dispose()
    request.addfinalizer(lambda: _remigrate(url))
    return url


def _remigrate(url: str) -> None:
    engine = make_engine(url)
    try:
        if migrate.current_revision(engine) is None:
            with engine.begin() as conn:
                conn.execute(text("DROP SCHEMA public CASCADE"))
                conn.execute(text("CREATE SCHEMA public"))
            migrate.upgrade(engine)
    finally:
        engine.dispose()


def test_two_processes_starting_on_an_empty_store_at_once_both_start(empty_url: str,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """Two ``curvekeeper serve`` started together on an empty store (a first deployment
    with two workers): one runs the migrations, the other must then find the schema at
    head and start too. The interleaving is forced here: this process reads "no revision",
    the other process completes the migrations, then this one looks at the tables.
    (With real processes the same race makes one of them exit at start-up now and then.)"""
    engine = make_engine(empty_url)
    other = make_engine(empty_url)
    real = migrate.current_revision
    calls = 0

    def other_process_migrates_meanwhile(e: Engine) -> str | None:
        nonlocal calls
        calls += 1
        seen = real(e)
        if calls == 1:
            migrate.upgrade(other)
        return seen

    monkeypatch.setattr(migrate, "current_revision", other_process_migrates_meanwhile)
    try:
        migrate.prepare(engine)
        assert real(engine) == migrate.head_revision(engine)
    finally:
        engine.dispose()
        other.dispose()


def test_two_processes_making_sure_of_the_admin_key_at_once_both_start(postgres_url: str,
                                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    """PostgreSQL: two workers started together with a new CURVEKEEPER_ADMIN_KEY both look
    the key up, find nothing, and insert it; the second insert must not stop its worker.
    The interleaving is forced: the other worker commits the key between this one's
    look-up and its insert. (SQLite cannot interleave so: a write transaction takes the
    file's write lock first.)"""
    empty_postgres(postgres_url)
    mine, theirs = Store(postgres_url), Store(postgres_url)
    real = Repository.key_by_hash
    calls = 0

    def other_worker_commits_meanwhile(repo: Repository, digest: str) -> Any:
        nonlocal calls
        calls += 1
        found = real(repo, digest)
        if calls == 1:
            with theirs.transaction(write=True) as other:
                keys_actions.ensure_admin_key(other, ADMIN)
        return found

    monkeypatch.setattr(Repository, "key_by_hash", other_worker_commits_meanwhile)
    try:
        with mine.transaction(write=True) as repo:
            keys_actions.ensure_admin_key(repo, ADMIN)
        with mine.transaction(write=False) as repo:
            assert repo.count_rows(ApiKey) == 1
    finally:
        mine.dispose()
        theirs.dispose()
