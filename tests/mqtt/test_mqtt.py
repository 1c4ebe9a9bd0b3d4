"""Samples over MQTT through the real broker (Mosquitto) and a real ``curvekeeper serve
--mqtt`` process: 10,000 samples land exactly once; SIGKILLs of the service while devices
keep publishing lose and double nothing; a bad payload gets the HTTP error body on the
results topic, stores nothing, and the messages after it are still learned."""

from __future__ import annotations

import random
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from curvekeeper.client import Client
from curvekeeper.store.tables import Sample
from sqlalchemy import create_engine, distinct, func, select

from tests.conftest import LINEAR, fresh_store
from tests.mqtt.broker import Publisher, Results, broker_url, service_env, unique_root, wait_subscribed
from tests.store.servers import ADMIN, Server, Triple, assert_exactly_once, assert_replays, stored_samples

pytestmark = pytest.mark.slow

SEED = 20261202
KILLS = 5


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path, sqlite_template: Path) -> str:
    broker_url()  # skips first when no broker answers
    return fresh_store(request, tmp_path, sqlite_template)


@pytest.fixture
def root() -> str:
    return unique_root()


@pytest.fixture
def server(store_url: str, tmp_path: Path, root: str) -> Iterator[Server]:
    s = Server(store_url, tmp_path, env=service_env(root))
    s.start()
    try:
        yield s
    finally:
        s.stop()


@pytest.fixture
def mqtt(server: Server, root: str) -> Iterator[tuple[Publisher, Results]]:
    pub, results = Publisher(root), Results(root)
    try:
        wait_subscribed(pub, results)
        yield pub, results
    finally:
        pub.close()
        results.close()


def body(source: str, first: int, n: int, rng: random.Random) -> dict[str, object]:
    """``n`` samples of a linear sensor (y = 2x + 1 with noise), seq ``first`` onwards."""
    out = []
    for q in range(first, first + n):
        x = rng.uniform(0.0, 100.0)
        out.append({"x": x, "y": 2.0 * x + 1.0 + rng.gauss(0.0, 0.01), "seq": q})
    return {"source": source, "samples": out}


def ours(results: Results, channel: str) -> list[dict[str, object]]:
    return [b for ch, b in results.snapshot() if ch == channel]


def test_ten_thousand_samples_land_exactly_once(server: Server, store_url: str,
                                                 mqtt: tuple[Publisher, Results]) -> None:
    pub, results = mqtt
    channel = "mq.bulk"
    with Client(server.url, ADMIN) as admin:
        admin.create_channel({"id": channel, **LINEAR})
    rng = random.Random(SEED)
    bodies = [body("dev-1", 1 + 100 * i, 100, rng) for i in range(100)]
    for b in bodies:
        pub.send(channel, b)
    for b in bodies[::10]:  # a device sending again what it sent: duplicates, not new samples
        pub.send(channel, b)
    deadline = time.monotonic() + 120
    while len(ours(results, channel)) < 110:
        assert time.monotonic() < deadline, f"{len(ours(results, channel))} results of 110"
        time.sleep(0.05)
    got = ours(results, channel)
    assert all("error" not in r for r in got), [r for r in got if "error" in r][:3]
    assert sum(int(r["accepted"]) for r in got) + sum(len(r["rejected"]) for r in got) == 10_000  # type: ignore[arg-type]
    assert sum(int(r["duplicates"]) for r in got) == 1000  # type: ignore[call-overload]
    with Client(server.url, ADMIN) as admin:
        assert admin.get_channel(channel)["n_samples"] == 10_000
    sent: set[Triple] = {(channel, "dev-1", q) for q in range(1, 10_001)}
    assert assert_exactly_once(store_url, sent, sent) == {channel: 10_000}
    assert not server.internal_errors(), server.internal_errors()[:5]
    assert_replays(store_url, [channel])


def test_sigkill_mid_stream_loses_and_doubles_nothing(server: Server, store_url: str,
                                                      mqtt: tuple[Publisher, Results]) -> None:
    pub, results = mqtt
    channels = ["mq.kill.a", "mq.kill.b"]
    with Client(server.url, ADMIN) as admin:
        for ch in channels:
            admin.create_channel({"id": ch, **LINEAR})
    rng = random.Random(SEED)
    sent: set[Triple] = set()
    lock = threading.Lock()
    stop = threading.Event()

    def publish() -> None:
        # the device publishes on while the service is killed and restarted; the broker holds
        # the messages for the service's persistent session meanwhile
        prng = random.Random(SEED + 1)
        seq = {ch: 1 for ch in channels}
        while not stop.is_set():
            ch = prng.choice(channels)
            b = body("dev-k", seq[ch], 10, prng)
            pub.send(ch, b)
            with lock:
                sent.update((ch, "dev-k", q) for q in range(seq[ch], seq[ch] + 10))
            seq[ch] += 10
            # a modest rate (about 500 samples/s): the broker's default queue for a session
            # that is away holds 1000 messages (deploy/mosquitto.conf lifts that limit)
            time.sleep(0.02)

    def sent_now() -> int:
        with lock:
            return len(sent)

    thread = threading.Thread(target=publish, daemon=True)
    thread.start()
    try:
        for _ in range(KILLS):
            target = sent_now() + rng.randint(50, 300)
            while sent_now() < target:
                time.sleep(0.01)
            server.kill()
            time.sleep(rng.uniform(0.0, 0.3))  # publishing goes on while it is down
            server.start()
            wait_for_stored(store_url, sent_now(), server)  # what was published up to the restart
        time.sleep(0.3)
    finally:
        stop.set()
        thread.join(timeout=30)
    assert server.starts == KILLS + 1
    with lock:
        final = set(sent)
    wait_for_stored(store_url, len(final), server)
    counts = assert_exactly_once(store_url, final, final)
    print(f"{len(final)} samples published across {KILLS} kills, stored once each: {counts}")
    with Client(server.url, ADMIN) as admin:
        assert sum(admin.get_channel(ch)["n_samples"] for ch in channels) == len(final)
    assert not server.internal_errors(), server.internal_errors()[:5]
    assert_replays(store_url, channels)


def wait_for_stored(store_url: str, n: int, server: Server, timeout: float = 60.0) -> None:
    """Until the store holds ``n`` samples, none of them twice at any moment."""
    engine = create_engine(store_url)
    deadline = time.monotonic() + timeout
    try:
        while True:
            with engine.connect() as conn:
                rows, unique = conn.execute(select(  # one statement: the service writes on meanwhile
                    func.count(), func.count(distinct(Sample.channel_pk * 10**9 + Sample.source_seq)))).one()
            assert rows == unique, f"{rows - unique} samples stored twice"
            if rows >= n:
                return
            if time.monotonic() > deadline:
                pytest.fail(f"fewer than {n} samples stored after {timeout} s\n{server.log_tail()}")
            time.sleep(0.1)
    finally:
        engine.dispose()


def test_bad_payloads_get_the_http_error_and_store_nothing(server: Server, store_url: str,
                                                           mqtt: tuple[Publisher, Results]) -> None:
    pub, results = mqtt
    good, archived = "mq.bad.ok", "mq.bad.archived"
    with Client(server.url, ADMIN) as admin:
        for ch in (good, archived):
            admin.create_channel({"id": ch, **LINEAR})
        admin.request("POST", f"/v1/channels/{archived}/archive", json={"note": "test"}, idempotent=False)
    http_error = httpx.post(f"{server.url}/v1/channels/{good}/samples", json={"samples": [{"x": "hot", "y": 1.0}]},
                            headers={"Authorization": f"Bearer {ADMIN}"})
    assert http_error.status_code == 422
    cases: list[tuple[str, bytes | dict[str, object], str]] = [
        (good, b"{not json", "malformed_json"),
        (good, b"\xff\xfe", "malformed_json"),
        (good, {"samples": "none"}, "validation_error"),
        (good, {"sample": [{"x": 1.0, "y": 3.0}]}, "validation_error"),
        (good, {"samples": [{"x": "hot", "y": 1.0}]}, "validation_error"),
        (good, {"samples": [{"x": [1.0, 2.0], "y": 1.0}]}, "invalid_request"),
        (good, {"samples": [{"x": 1.0, "y": 3.0, "t": "2999-01-01T00:00:00Z"}]}, "invalid_request"),
        ("mq.bad.unknown", {"samples": [{"x": 1.0, "y": 3.0}]}, "channel_not_found"),
        (archived, {"samples": [{"x": 1.0, "y": 3.0}]}, "archived"),
    ]
    for ch, payload, _ in cases:
        pub.send(ch, payload)
    pub.send(good, {"source": "dev-b", "samples": [{"x": 1.0, "y": 3.0, "seq": 1}, {"x": 2.0, "y": 5.0, "seq": 2}]})
    expected = [(ch, code) for ch, _, code in cases]
    mine = {ch for ch, _, _ in cases}
    deadline = time.monotonic() + 60
    while len([1 for ch, _ in results.snapshot() if ch in mine]) < len(cases) + 1:
        assert time.monotonic() < deadline, results.snapshot()[-5:]
        time.sleep(0.05)
    got = [(ch, b) for ch, b in results.snapshot() if ch in mine]
    assert [(ch, b["error"]["code"]) for ch, b in got[:-1]] == expected, got  # type: ignore[index]
    assert got[4][1] == http_error.json()  # the very body HTTP answers
    assert got[-1] == (good, {**got[-1][1], "accepted": 2, "duplicates": 0, "n_samples": 2})
    with Client(server.url, ADMIN) as admin:
        assert admin.get_channel(good)["n_samples"] == 2
    rows, _ = stored_samples(store_url)
    assert sorted(rows) == [(good, "dev-b", 1), (good, "dev-b", 2)]
    assert not server.internal_errors(), server.internal_errors()[:5]
