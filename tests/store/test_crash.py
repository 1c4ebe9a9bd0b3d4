"""Crash safety: a real ``curvekeeper serve`` is killed with SIGKILL at seeded moments while
clients keep writing, and restarted on the same store (SQLite file; PostgreSQL when
CURVEKEEPER_TEST_DATABASE_URL is set).

What must hold afterwards: every acknowledged sample is stored exactly once (the client
retries with ``source`` + ``seq``), nothing is stored that was not sent, every snapshot and
rollback is either fully done or not at all, and ``curvekeeper replay --check`` rebuilds
every channel's stored state from its log."""

from __future__ import annotations

import multiprocessing
import random
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from curvekeeper.client import Client, ClientError
from curvekeeper.store.tables import Channel, ChannelState, Event, Sample, Snapshot
from sqlalchemy import create_engine, select

from tests.conftest import LINEAR, fresh_store
from tests.store.servers import ADMIN, Server, Triple, assert_exactly_once, assert_replays
from tests.store.workers import read_log, retrying_client, stream

pytestmark = pytest.mark.slow

SEED = 20261201
KILLS = 4  # each kill and restart tests the same guarantee; four keep the run short
WAIT_S = 60.0  # longest wait for the clients to make progress between kills (a loaded machine)


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path, sqlite_template: Path) -> str:
    return fresh_store(request, tmp_path, sqlite_template)


@pytest.fixture
def server(store_url: str, tmp_path: Path) -> Iterator[Server]:
    s = Server(store_url, tmp_path)
    s.start()
    try:
        yield s
    finally:
        s.stop()


def wait_for(progress: Callable[[], int], target: int, what: str, server: Server) -> None:
    """Until ``progress()`` reaches ``target``; fails after WAIT_S seconds without it."""
    deadline = time.monotonic() + WAIT_S
    while progress() < target:
        if time.monotonic() > deadline:
            pytest.fail(f"no progress {what} in {WAIT_S} s\n{server.log_tail()}")
        time.sleep(0.01)


def setup(server: Server, channels: list[str]) -> str:
    """Create the channels; a device key limited to their prefix (its secret)."""
    with Client(server.url, ADMIN) as admin:
        for ch in channels:
            admin.create_channel({"id": ch, **LINEAR})
        key: dict[str, Any] = admin.request("POST", "/v1/keys", idempotent=False,
                                            json={"role": "device", "prefixes": [channels[0].split(".")[0] + "."],
                                                  "label": "crash test devices"})
    return str(key["secret"])


def kill_loop(server: Server, progress: Callable[[], int], rng: random.Random, *, steps: tuple[int, int]) -> None:
    """KILLS times: let the clients make a random amount of progress, then SIGKILL the
    server and start it again on the same port and store."""
    for k in range(KILLS):
        wait_for(progress, progress() + rng.randint(*steps), f"before kill {k}", server)
        time.sleep(rng.uniform(0.0, 0.02))
        server.kill()
        server.start()
    wait_for(progress, progress() + steps[1], "after the last restart", server)


def test_acknowledged_samples_are_stored_exactly_once_across_kills(server: Server, store_url: str,
                                                                   tmp_path: Path) -> None:
    names = [f"client-{i}" for i in range(3)]
    own = {n: f"crash.{n}" for n in names}
    shared = "crash.shared"
    device = setup(server, [shared, *own.values()])
    ctx = multiprocessing.get_context("spawn")
    stop = ctx.Event()
    progress = ctx.Value("i", 0)
    logs = {n: tmp_path / f"{n}.jsonl" for n in names}
    procs = [ctx.Process(target=stream, args=(server.url, device, n, own[n], shared, str(logs[n]), stop, progress,
                                              SEED + i), daemon=True) for i, n in enumerate(names)]
    for p in procs:
        p.start()
    try:
        kill_loop(server, lambda: int(progress.value), random.Random(SEED), steps=(5, 60))
    finally:
        stop.set()
        for p in procs:
            p.join(timeout=40)
        alive = [p.pid for p in procs if p.is_alive()]
        for p in procs:
            if p.is_alive():
                p.kill()
                p.join(timeout=10)
    assert not alive, f"client processes {alive} did not stop"
    assert [p.exitcode for p in procs] == [0] * len(procs)
    assert server.starts == KILLS + 1

    acked: set[Triple] = set()
    sent: set[Triple] = set()
    duplicates = 0
    for n in names:
        got = read_log(logs[n])
        assert not got.errors, f"{n} got errors: {got.errors[:5]}"
        acked |= got.acked
        sent |= got.sent
        duplicates += got.duplicates
    counts = assert_exactly_once(store_url, acked, sent)
    print(f"samples: {len(sent)} sent, {len(acked)} acknowledged, {sum(counts.values())} stored, "
          f"{duplicates} answered as duplicates of a cut-off attempt; per channel {counts}")
    assert set(counts) == {shared, *own.values()} and all(counts.values())
    assert not server.internal_errors(), server.internal_errors()[:5]
    assert_replays(store_url, counts)


class Technician:
    """Posts samples, takes snapshots and rolls back to random earlier ones, and records
    each snapshot / rollback request's outcome: ``acked`` (with the answer), ``unknown``
    (the connection broke after the request was sent) or ``error``."""

    def __init__(self, url: str, channel: str, seed: int) -> None:
        self.url, self.channel = url, channel
        self.rng = random.Random(seed)
        self.stop = threading.Event()
        self.ops = 0
        self.records: list[dict[str, Any]] = []
        self.acked: set[Triple] = set()
        self.sent: set[Triple] = set()
        self.failure: BaseException | None = None

    def progress(self) -> int:
        """Snapshot and rollback requests answered so far (raises once the loop has failed)."""
        if self.failure is not None:
            raise AssertionError(f"the technician loop failed: {self.failure!r}")
        return self.ops

    def run(self) -> None:
        try:
            with retrying_client(self.url, ADMIN, SEED) as c:
                self._loop(c)
        except BaseException as exc:  # reported by the test
            self.failure = exc

    def _loop(self, c: Client) -> None:
        known: list[int] = []
        seq = 0
        while not self.stop.is_set():
            batch = []
            for _ in range(self.rng.randint(1, 4)):
                seq += 1
                x = self.rng.uniform(0.0, 100.0)
                batch.append({"x": x, "y": 1.5 * x - 2.0 + self.rng.gauss(0.0, 0.3), "seq": seq})
            triples = {(self.channel, "bench", int(s["seq"])) for s in batch}
            self.sent |= triples
            while True:  # the same batch until it is acknowledged (idempotent: source + seq)
                try:
                    c.post_samples(self.channel, batch, source="bench")
                    break
                except ClientError as exc:
                    if exc.status is not None:
                        raise
                    if self.stop.is_set():
                        return
            self.acked |= triples
            rec: dict[str, Any]
            if not known or self.rng.random() < 0.5:
                rec = {"kind": "snapshot", "label": f"tech-{self.ops}"}
            else:
                rec = {"kind": "rollback", "target": self.rng.choice(known)}
            try:
                if rec["kind"] == "snapshot":
                    rec["answer"] = c.take_snapshot(self.channel, label=rec["label"])
                    known.append(rec["answer"]["id"])
                else:
                    rec["answer"] = c.rollback(self.channel, rec["target"])
                    known.append(rec["answer"]["snapshot_before"])
                rec["outcome"] = "acked"
            except ClientError as exc:
                rec["outcome"] = "unknown" if exc.status is None else "error"
                rec["error"] = str(exc)
            self.records.append(rec)
            self.ops += 1


def test_snapshots_and_rollbacks_are_all_or_nothing_across_kills(server: Server, store_url: str,
                                                                  tmp_path: Path) -> None:
    channel = "tech.c1"
    device = setup(server, [channel])
    # a device keeps streaming into the same channel, so rollbacks race with ingests
    ctx = multiprocessing.get_context("spawn")
    stop, progress = ctx.Event(), ctx.Value("i", 0)
    log = tmp_path / "device.jsonl"
    proc = ctx.Process(target=stream, args=(server.url, device, "device", channel, channel, str(log), stop, progress,
                                            SEED), daemon=True)
    proc.start()
    tech = Technician(server.url, channel, SEED + 1)
    thread = threading.Thread(target=tech.run, daemon=True)
    thread.start()
    try:
        kill_loop(server, tech.progress, random.Random(SEED + 2), steps=(1, 6))
    finally:
        tech.stop.set()
        stop.set()
        thread.join(timeout=40)
        proc.join(timeout=40)
        if proc.is_alive():
            proc.kill()
            proc.join(timeout=10)
    assert tech.failure is None, repr(tech.failure)
    assert not thread.is_alive() and proc.exitcode == 0
    errors = [r for r in tech.records if r["outcome"] == "error"]
    assert not errors, errors[:5]

    log_of = read_channel(store_url, channel)
    check_rollbacks(log_of, tech.records)
    check_snapshots(log_of, tech.records)
    n_acked = Counter(r["kind"] for r in tech.records if r["outcome"] == "acked")
    unknown = Counter(r["kind"] for r in tech.records if r["outcome"] == "unknown")
    print(f"acknowledged {dict(n_acked)}, outcome unknown {dict(unknown)}; stored "
          f"{len(log_of.by_reason('manual'))} manual snapshots, {len(log_of.rollbacks)} rollbacks")
    assert n_acked["rollback"] >= KILLS // 2 and n_acked["snapshot"] >= KILLS // 2

    dev = read_log(log)
    assert not dev.errors, dev.errors[:5]
    assert_exactly_once(store_url, tech.acked | dev.acked, tech.sent | dev.sent)
    assert not server.internal_errors(), server.internal_errors()[:5]
    assert_replays(store_url, [channel])


@dataclass(frozen=True)
class SnapRow:
    pk: int
    reason: str
    label: str | None
    version: int


@dataclass(frozen=True)
class EventRow:
    pk: int
    kind: str
    version: int | None
    details: dict[str, Any]


@dataclass
class ChannelLog:
    """What the store holds for one channel: snapshots by id, events in order, the
    versions of its samples, and the state's version."""

    snaps: dict[int, SnapRow]
    events: list[EventRow]
    sample_versions: list[int]
    version: int

    @property
    def rollbacks(self) -> list[EventRow]:
        return [e for e in self.events if e.kind == "rollback"]

    def by_reason(self, reason: str) -> dict[int, SnapRow]:
        return {pk: s for pk, s in self.snaps.items() if s.reason == reason}


def read_channel(db_url: str, channel: str) -> ChannelLog:
    engine = create_engine(db_url)
    try:
        with engine.connect() as conn:
            pk = conn.scalar(select(Channel.pk).where(Channel.id == channel))
            snaps = {int(r.pk): SnapRow(int(r.pk), r.reason, r.label, int(r.version))
                     for r in conn.execute(select(Snapshot.pk, Snapshot.reason, Snapshot.label, Snapshot.version)
                                           .where(Snapshot.channel_pk == pk))}
            events = [EventRow(int(r.pk), r.kind, r.version, r.details)
                      for r in conn.execute(select(Event.pk, Event.kind, Event.version, Event.details)
                                            .where(Event.channel_pk == pk).order_by(Event.pk))]
            versions = [int(v) for v in conn.scalars(select(Sample.version).where(Sample.channel_pk == pk))]
            version = int(conn.scalar(select(ChannelState.version).where(ChannelState.channel_pk == pk)) or 0)
    finally:
        engine.dispose()
    return ChannelLog(snaps, events, versions, version)


def check_rollbacks(log: ChannelLog, records: list[dict[str, Any]]) -> None:
    """A rollback is its before-snapshot, its event and its new version together, or none of
    them: acknowledged ones are all there, unacknowledged ones completely or not at all."""
    rollbacks = log.rollbacks
    before = log.by_reason("before-rollback")
    refs = Counter(int(e.details["snapshot_before"]) for e in rollbacks)
    assert set(refs) == set(before), f"before-rollback snapshots without their rollback: {set(before) - set(refs)}"
    assert set(refs.values()) <= {1}, "a before-rollback snapshot named by two rollbacks"
    for e in rollbacks:
        b = log.snaps[int(e.details["snapshot_before"])]
        assert b.label == f"before rollback to {e.details['snapshot']}"
        assert e.version is not None and b.version == e.version - 1
        assert int(e.details["snapshot"]) in log.snaps
    # the channel's versions: one per sample and one per rollback, none skipped or shared
    versions = log.sample_versions + [int(e.version or 0) for e in rollbacks]
    assert sorted(versions) == list(range(1, log.version + 1))
    acked = [r for r in records if r["kind"] == "rollback" and r["outcome"] == "acked"]
    unknown = [r for r in records if r["kind"] == "rollback" and r["outcome"] == "unknown"]
    for r in acked:
        match = [e for e in rollbacks if int(e.details["snapshot_before"]) == r["answer"]["snapshot_before"]]
        assert len(match) == 1 and int(match[0].details["snapshot"]) == r["target"]
        assert match[0].version == r["answer"]["version"]
    assert len(acked) <= len(rollbacks) <= len(acked) + len(unknown)


def check_snapshots(log: ChannelLog, records: list[dict[str, Any]]) -> None:
    """A snapshot is its row and its event together, stored at most once per request;
    acknowledged ones are there with the answered id, label and version."""
    manual = log.by_reason("manual")
    events = Counter(int(e.details["snapshot"]) for e in log.events
                     if e.kind == "snapshot" and e.details.get("reason") == "manual")
    assert set(events) == set(manual) and set(events.values()) <= {1}
    labels = Counter(s.label for s in manual.values())
    attempted = {r["label"]: r for r in records if r["kind"] == "snapshot"}
    assert set(labels.values()) <= {1} and set(labels) <= set(attempted)
    acked = [r for r in attempted.values() if r["outcome"] == "acked"]
    unknown = [r for r in attempted.values() if r["outcome"] == "unknown"]
    for r in acked:
        s = manual.get(r["answer"]["id"])
        assert s is not None and s.label == r["label"] and s.version == r["answer"]["version"]
    assert len(acked) <= len(manual) <= len(acked) + len(unknown)
