"""The real thing: ``curvekeeper serve`` in its own process on a free loopback port."""

from __future__ import annotations

import fcntl
import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest
from curvekeeper.core.jit import cache_dir
from curvekeeper.kernels import LOCK_NAME

# real server processes (one on an empty kernel cache): in the README command, not the quick loop
pytestmark = pytest.mark.slow

SECRET = "ck_server-test-admin-0123456789"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for(url: str, path: str, proc: subprocess.Popen[str]) -> None:
    """Until ``path`` answers 200 (fails when the server exits or takes a minute)."""
    deadline = time.monotonic() + 60
    while True:
        try:
            if httpx.get(url + path, timeout=1).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if proc.poll() is not None or time.monotonic() > deadline:
            out = proc.stdout.read() if proc.stdout else ""
            pytest.fail(f"{path} never answered 200: {out}")
        time.sleep(0.1)


@contextmanager
def serve(tmp_path: Path, **env: str) -> Iterator[tuple[str, subprocess.Popen[str]]]:
    """``python -m curvekeeper.cli serve`` on a free port with a fresh SQLite store."""
    port = free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "curvekeeper.cli", "serve", "--port", str(port),
         "--db", f"sqlite:///{tmp_path / 'served.db'}"],
        env={**os.environ, "CURVEKEEPER_ADMIN_KEY": SECRET, **env},
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        yield f"http://127.0.0.1:{port}", proc
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        if proc.stdout:
            proc.stdout.close()


@pytest.fixture
def server(tmp_path: Path) -> Iterator[str]:
    with serve(tmp_path) as (url, proc):
        wait_for(url, "/readyz", proc)
        yield url


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


def kernel_specializations(c: httpx.Client) -> float:
    """The server's count of compiled kernel specialisations, from /metrics."""
    for line in c.get("/metrics").text.splitlines():
        if line.startswith("curvekeeper_kernel_specializations "):
            return float(line.split()[1])
    raise AssertionError("no curvekeeper_kernel_specializations in /metrics")


def test_liveness_answers_while_the_kernels_build_and_readiness_waits_for_them(tmp_path: Path) -> None:
    cache = tmp_path / "numba"  # empty: the server compiles every kernel
    kernels_dir = cache_dir(cache)  # where the server's kernels cache, for this source
    assert kernels_dir is not None
    with open(kernels_dir / LOCK_NAME, "a+b") as held:
        # the server's build waits for this lock (as behind another process's build), so
        # the window in which it is live but not ready is certain
        fcntl.flock(held, fcntl.LOCK_EX)
        with serve(tmp_path, NUMBA_CACHE_DIR=str(cache)) as (url, proc):
            wait_for(url, "/healthz", proc)
            r = httpx.get(url + "/readyz", timeout=5)
            assert r.status_code == 503 and r.headers.get("Retry-After"), r.text
            assert r.json()["error"] == {"code": "not_ready", "message": "the compiled kernels are still being built",
                                         "details": {"reason": "kernels_building"}}
            assert httpx.get(url + "/healthz", timeout=5).json() == {"status": "ok"}
            fcntl.flock(held, fcntl.LOCK_UN)
            wait_for(url, "/readyz", proc)

            with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {SECRET}"}, timeout=30) as c:
                assert c.get("/readyz").json() == {"status": "ready"}
                built = kernel_specializations(c)
                r = c.post("/v1/channels", json={"id": "bench.rtd1",
                                                 "inputs": [{"name": "raw", "unit": "ohm", "min": 80, "max": 140}],
                                                 "output": {"name": "temperature", "unit": "degC"}})
                assert r.status_code == 201, r.text
                r = c.post("/v1/channels/bench.rtd1/samples", json={"samples": [{"x": 100.0, "y": 0.0}]})
                assert r.status_code == 200 and r.json()["accepted"] == 1, r.text
                # neither the new channel nor its first sample compiled or loaded machine code
                assert built > 0 and kernel_specializations(c) == built
    assert list(kernels_dir.rglob("*.nbi")), "the build wrote no cache index"
