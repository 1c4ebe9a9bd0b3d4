"""Two real ``curvekeeper serve --mqtt`` processes on one PostgreSQL store, subscribed as
one MQTT 5 shared-subscription group: the broker gives each message to one of them, so
both learn some of the samples; every sample is stored exactly once (a device's message
sent twice goes to the other process the second time: source + seq make it a duplicate
there); and each channel's learned state is what a replay of its stored log in commit
order gives (``curvekeeper replay --check``), although two messages of one channel were
learned by two processes at once. PostgreSQL only: SQLite is one process's store."""

from __future__ import annotations

import random
import re
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from curvekeeper.client import Client

from tests.conftest import LINEAR, fresh_store
from tests.mqtt.broker import Publisher, Results, broker_url, service_env, unique_root
from tests.store.servers import ADMIN, Server, Triple, assert_exactly_once, assert_replays

pytestmark = pytest.mark.slow

SEED = 20261203
CHANNELS = [f"mq.share.{i}" for i in range(6)]
MESSAGES = 40  # per channel
PER_MESSAGE = 10  # samples per message
PROBE = "mq.share.probe"


@pytest.fixture(params=["postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path, sqlite_template: Path) -> str:
    broker_url()  # skips first when no broker answers
    return fresh_store(request, tmp_path, sqlite_template)  # skips without CURVEKEEPER_TEST_DATABASE_URL


@pytest.fixture
def root() -> str:
    return unique_root()


@pytest.fixture
def servers(store_url: str, tmp_path: Path, root: str) -> Iterator[list[Server]]:
    out: list[Server] = []
    try:
        for n in (1, 2):
            env = {**service_env(root), "CURVEKEEPER_MQTT_CLIENT_ID": f"ck-{root.split('/')[0]}-{n}",
                   "CURVEKEEPER_MQTT_SHARE_GROUP": "ck-test-group"}
            server = Server(store_url, tmp_path, name=f"server{n}", env=env)
            out.append(server)
            server.start()
        yield out
    finally:
        for s in out:
            s.stop()


def samples_learned(server: Server) -> dict[str, int]:
    """This process's own counts of samples by outcome (its /metrics)."""
    text = httpx.get(f"{server.url}/metrics", headers={"Authorization": f"Bearer {ADMIN}"}, timeout=10).text
    return {m[1]: int(float(m[2])) for m in re.finditer(r'^curvekeeper_samples_total\{outcome="(\w+)"\} (\S+)$',
                                                        text, re.M)}


def body(source: str, first: int, rng: random.Random) -> dict[str, object]:
    out = []
    for q in range(first, first + PER_MESSAGE):
        x = rng.uniform(0.0, 100.0)
        out.append({"x": x, "y": 2.0 * x + 1.0 + rng.gauss(0.0, 0.05), "seq": q})
    return {"source": source, "samples": out}


def wait_results(results: Results, channels: set[str], n: int, servers: list[Server]) -> None:
    deadline = time.monotonic() + 120
    while len([1 for ch, _ in results.snapshot() if ch in channels]) < n:
        if time.monotonic() > deadline:
            pytest.fail(f"{n} results expected\n" + "\n".join(s.log_tail() for s in servers))
        time.sleep(0.05)


def test_two_processes_share_the_load_learn_each_sample_once_and_replay_clean(
        servers: list[Server], store_url: str, root: str) -> None:
    with Client(servers[0].url, ADMIN) as admin:
        for ch in [*CHANNELS, PROBE]:
            admin.create_channel({"id": ch, **LINEAR})
    pub, results = Publisher(root), Results(root)
    sent: set[Triple] = set()
    try:
        # until each process has learned a probe: then both are members of the group
        probe_seq = 1
        deadline = time.monotonic() + 60
        while not all(samples_learned(s).get("accepted", 0) > 0 for s in servers):
            assert time.monotonic() < deadline, "the two processes never both took a message"
            pub.send(PROBE, {"source": "probe", "samples": [{"x": 1.0, "y": 3.0, "seq": probe_seq}]})
            sent.add((PROBE, "probe", probe_seq))
            probe_seq += 1
            time.sleep(0.1)
        wait_results(results, {PROBE}, probe_seq - 1, servers)
        before = [samples_learned(s) for s in servers]

        rng = random.Random(SEED)
        messages = [(ch, body(f"dev-{ch}", 1 + PER_MESSAGE * m, rng)) for m in range(MESSAGES) for ch in CHANNELS]
        again = set(rng.sample(range(len(messages)), len(messages) // 10))
        count = 0
        for i, (ch, b) in enumerate(messages):
            # a device repeating a message at once: the broker gives the copy to the other process
            for _ in range(2 if i in again else 1):
                pub.send(ch, b)
                count += 1
            sent.update((ch, f"dev-{ch}", int(s["seq"])) for s in b["samples"])  # type: ignore[attr-defined]
        wait_results(results, set(CHANNELS), count, servers)
        got = [r for ch, r in results.snapshot() if ch in CHANNELS]
        assert all("error" not in r for r in got), [r for r in got if "error" in r][:3]
    finally:
        pub.close()
        results.close()

    after = [samples_learned(s) for s in servers]
    accepted = [a.get("accepted", 0) - b.get("accepted", 0) for a, b in zip(after, before, strict=True)]
    duplicates = [a.get("duplicate", 0) - b.get("duplicate", 0) for a, b in zip(after, before, strict=True)]
    print(f"samples learned by each process: {accepted}; duplicates met: {duplicates}")
    assert all(n > 0 for n in accepted), f"one process learned everything: {accepted}"
    assert sum(accepted) == len(CHANNELS) * MESSAGES * PER_MESSAGE
    assert sum(duplicates) == len(again) * PER_MESSAGE
    counts = assert_exactly_once(store_url, sent, sent)
    assert {ch: counts[ch] for ch in CHANNELS} == {ch: MESSAGES * PER_MESSAGE for ch in CHANNELS}
    with Client(servers[1].url, ADMIN) as admin:
        assert [admin.get_channel(ch)["n_samples"] for ch in CHANNELS] == [MESSAGES * PER_MESSAGE] * len(CHANNELS)
    for s in servers:
        assert not s.internal_errors(), s.internal_errors()[:5]
    assert_replays(store_url, [*CHANNELS, PROBE])
