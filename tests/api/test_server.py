"""The real thing: ``curvekeeper serve`` in its own process on a free loopback port."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

SECRET = "ck_server-test-admin-0123456789"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def server(tmp_path: Path) -> Iterator[str]:
    port = free_port()
    env = {**os.environ, "CURVEKEEPER_ADMIN_KEY": SECRET}
    proc = subprocess.Popen(
        [sys.executable, "-m", "curvekeeper.cli", "serve", "--port", str(port),
         "--db", f"sqlite:///{tmp_path / 'served.db'}"],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    try:
        while True:
            try:
                if httpx.get(url + "/healthz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                out = proc.stdout.read() if proc.stdout else ""
                pytest.fail(f"server did not start: {out}")
            time.sleep(0.2)
        yield url
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        if proc.stdout:
            proc.stdout.close()


def test_a_real_server_learns_predicts_and_rolls_back(server: str) -> None:
    h = {"Authorization": f"Bearer {SECRET}"}
    with httpx.Client(base_url=server, headers=h, timeout=30) as c:
        assert c.get("/readyz").json() == {"status": "ready"}
        assert c.get("/v1/channels", headers={"Authorization": "Bearer wrong"}).status_code == 401
        r = c.post("/v1/channels", json={"id": "bench.loadcell1",
                                         "inputs": [{"name": "raw", "unit": "count", "min": 0, "max": 65535}],
                                         "output": {"name": "force", "unit": "N"}})
        assert r.status_code == 201, r.text
        cal = c.post("/v1/channels/bench.loadcell1/calibrate",
                     json={"points": [{"x": 0, "y": 0.0}, {"x": 32768, "y": 500.0}, {"x": 65535, "y": 1000.0}]})
        assert cal.status_code == 200, cal.text
        samples = [{"x": float(x), "y": x * 1000.0 / 65535 + 2.0, "seq": i}
                   for i, x in enumerate(range(0, 65535, 655))]
        r = c.post("/v1/channels/bench.loadcell1/samples", json={"source": "rig", "samples": samples})
        assert r.status_code == 200 and r.json()["accepted"] == len(samples)
        retry = c.post("/v1/channels/bench.loadcell1/samples", json={"source": "rig", "samples": samples})
        assert retry.json()["duplicates"] == len(samples)
        before = c.post("/v1/channels/bench.loadcell1/predict",
                        json={"x": [1000.0], "snapshot": cal.json()["snapshot_after"]}).json()
        rb = c.post("/v1/channels/bench.loadcell1/rollback", json={"snapshot": cal.json()["snapshot_after"]})
        assert rb.status_code == 200, rb.text
        after = c.post("/v1/channels/bench.loadcell1/predict", json={"x": [1000.0]}).json()
        assert after["y"] == before["y"] and after["u"] == before["u"]
        assert "curvekeeper_samples_total" in c.get("/metrics").text
