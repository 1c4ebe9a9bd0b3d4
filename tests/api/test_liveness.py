"""Liveness of a real server under heavy requests: ``/healthz`` answers within a second
while each kind of heavy request runs (oversized bodies, large batches on a costly rls
channel, large predicts and calibrations). A request that held the event loop would hold
every ``/healthz`` behind it for as long: a latency bound on it is the behaviour itself.
"""

from __future__ import annotations

import json
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.api.test_load import BIG_RLS
from tests.api.test_server import SECRET, serve, wait_for
from tests.conftest import LINEAR

pytestmark = pytest.mark.slow

#: generous: a request handled on the loop holds /healthz for seconds at these sizes
MAX_HEALTHZ_S = 1.0


@pytest.fixture
def server(tmp_path: Path) -> Iterator[str]:
    with serve(tmp_path) as (url, proc):
        wait_for(url, "/readyz", proc)
        yield url


def slowest_healthz_during(url: str, request: Callable[[], httpx.Response]) -> tuple[float, httpx.Response]:
    """The longest ``/healthz`` round trip (s) while ``request`` runs, and its answer."""
    worst = 0.0
    stop = threading.Event()

    def poll() -> None:
        nonlocal worst
        with httpx.Client(base_url=url, timeout=60) as c:
            while not stop.is_set():
                t0 = time.perf_counter()
                assert c.get("/healthz").status_code == 200
                worst = max(worst, time.perf_counter() - t0)
                time.sleep(0.01)

    poller = threading.Thread(target=poll)
    poller.start()
    try:
        time.sleep(0.1)
        answer = request()
    finally:
        stop.set()
        poller.join()
    return worst, answer


def test_heavy_requests_leave_healthz_responsive(server: str) -> None:
    h = {"Authorization": f"Bearer {SECRET}"}
    with httpx.Client(base_url=server, headers=h, timeout=120) as c:
        r = c.post("/v1/channels", json={"id": "site-a.big", **BIG_RLS, "snapshot_every": 57})
        assert r.status_code == 201, r.text

        def rls_samples(n: int) -> dict[str, Any]:
            return {"samples": [{"x": [(i % 97) / 97, (i % 89) / 89, (i % 83) / 83], "y": float(i % 7)}
                               for i in range(n)]}

        post = "/v1/channels/site-a.big/samples"
        # just under the body limit (8 MiB): counted, not only refused by its size
        too_many = json.dumps({"samples": [{"x": 1, "y": 2}] * 550_000}, separators=(",", ":"))
        typed = {"Content-Type": "application/json"}
        heavy: list[tuple[str, Callable[[], httpx.Response], int]] = [
            ("a body of 550,000 samples", lambda: c.post(post, content=too_many, headers=typed), 413),
            ("predict with too many values", lambda: c.post("/v1/channels/site-a.big/predict",
                                                            json={"x": [0.5] * 1_000_000}), 413),
            ("300 samples of a 120-term rls channel", lambda: c.post(post, json=rls_samples(300)), 200),
            ("10,000 samples of a 120-term rls channel", lambda: c.post(post, json=rls_samples(10_000)), 200),
            ("predict 10,000 values on it", lambda: c.post("/v1/channels/site-a.big/predict",
                                                           json={"x": [[0.5, 0.5, 0.5]] * 10_000}), 200),
            ("calibrate on 100,000 points", lambda: c.post("/v1/channels/site-a.big/calibrate", json={
                "points": [{"x": [(i % 97) / 97, (i % 89) / 89, (i % 83) / 83], "y": 1.0} for i in range(100_000)],
                "dry_run": True}), 200),
        ]
        for what, request, status in heavy:
            worst, answer = slowest_healthz_during(server, request)
            assert answer.status_code == status, (what, answer.text[:300])
            assert worst < MAX_HEALTHZ_S, f"/healthz took {worst:.2f} s during {what}"


def test_a_held_write_lock_neither_stalls_healthz_nor_stretches_the_busy_timeout(tmp_path: Path) -> None:
    """Another process holds the store's write lock for longer than the busy timeout while
    many writers post at once: each writer answers 503 store_busy (Retry-After) within about
    the busy timeout, and /healthz keeps answering at once meanwhile."""
    busy = 1.0
    with serve(tmp_path, CURVEKEEPER_BUSY_TIMEOUT_S=str(busy)) as (url, proc):
        wait_for(url, "/readyz", proc)
        h = {"Authorization": f"Bearer {SECRET}"}
        with httpx.Client(base_url=url, headers=h, timeout=60) as c:
            assert c.post("/v1/channels", json={"id": "site-a.p1", **LINEAR}).status_code == 201
        lock = sqlite3.connect(tmp_path / "served.db", isolation_level=None)
        answers: list[tuple[float, httpx.Response]] = []
        # more writers than the store's pooled connections and the worker threads; small ones
        # (tried on the event loop first) and large ones (straight to a worker thread)
        n = 60
        bodies = [json.dumps({"samples": [{"x": 1.0, "y": 2.0}] * (1 if i % 2 else 2000)}) for i in range(n)]
        clients = [httpx.Client(base_url=url, headers={**h, "Content-Type": "application/json"}, timeout=60)
                   for _ in range(n)]
        start = threading.Barrier(n)

        def writer(i: int) -> None:
            start.wait()
            t0 = time.perf_counter()
            r = clients[i].post("/v1/channels/site-a.p1/samples", content=bodies[i])
            answers.append((time.perf_counter() - t0, r))

        def writers() -> httpx.Response:
            threads = [threading.Thread(target=writer, args=(i,)) for i in range(n)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            return answers[0][1]

        lock.execute("BEGIN IMMEDIATE")
        try:
            worst, _ = slowest_healthz_during(url, writers)
        finally:
            lock.execute("ROLLBACK")
            lock.close()
            for client in clients:
                client.close()
    assert len(answers) == n
    for _, r in answers:
        assert r.status_code == 503 and r.json()["error"]["code"] == "store_busy", r.text[:300]
        assert r.headers["Retry-After"]
    slowest = max(took for took, _ in answers)
    assert slowest < busy + MAX_HEALTHZ_S, f"a writer answered after {slowest:.2f} s (busy timeout {busy} s)"
    assert worst < MAX_HEALTHZ_S, f"/healthz took {worst:.2f} s while the lock was held"
