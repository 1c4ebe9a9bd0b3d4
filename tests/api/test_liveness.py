"""Liveness of a real server under heavy requests: ``/healthz`` answers within a second
while each kind of heavy request runs (oversized bodies, large batches on a costly rls
channel, large predicts and calibrations). A request that held the event loop would hold
every ``/healthz`` behind it for as long: a latency bound on it is the behaviour itself.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.api.test_load import BIG_RLS
from tests.api.test_server import SECRET, serve, wait_for

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
