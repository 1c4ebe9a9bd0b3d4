"""HTTP benchmark: a real ``curvekeeper serve`` process against a no-op FastAPI route
served the same way (uvicorn, one process), driven by one httpx client from this
process, in the same run. Prints samples/s per batch size and the ratio to the no-op
route, and predict latency percentiles.

Run: ``python -m tests.bench.http_bench`` (``--quick`` for a short run).
"""

from __future__ import annotations

import argparse
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx

SECRET = "ck_bench-admin-secret-0123456789"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start(cmd: list[str], url: str, env: dict[str, str]) -> subprocess.Popen[bytes]:
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            httpx.get(url + "/docs", timeout=1)
            return proc
        except httpx.TransportError:
            time.sleep(0.2)
    proc.kill()
    raise RuntimeError(f"{cmd} did not start")


def body(batch: int, start_seq: int) -> dict[str, Any]:
    return {"source": "bench", "samples": [
        {"x": float((start_seq + i) % 1000) / 10.0, "y": 1.0 + 0.02 * ((start_seq + i) % 1000) / 10.0,
         "seq": start_seq + i} for i in range(batch)]}


def drive(client: httpx.Client, path: str, batch: int, requests: int, seq0: int) -> float:
    """Samples per second over ``requests`` requests of ``batch`` samples (bodies prebuilt)."""
    bodies = [body(batch, seq0 + r * batch) for r in range(requests)]
    t0 = time.perf_counter()
    for b in bodies:
        r = client.post(path, json=b)
        if r.status_code != 200:
            raise RuntimeError(r.text)
    return requests * batch / (time.perf_counter() - t0)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__)
    p.add_argument("--quick", action="store_true")
    args = p.parse_args()
    plan = {1: 300, 100: 100, 1000: 30} if args.quick else {1: 1500, 100: 300, 1000: 60}
    rounds = 3
    env = {**os.environ, "CURVEKEEPER_ADMIN_KEY": SECRET}
    tmp = Path(tempfile.mkdtemp())
    ours_port, noop_port = free_port(), free_port()
    ours_url, noop_url = f"http://127.0.0.1:{ours_port}", f"http://127.0.0.1:{noop_port}"
    ours = start([sys.executable, "-m", "service.cli", "serve", "--port", str(ours_port),
                  "--db", f"sqlite:///{tmp / 'bench.db'}"], ours_url, env)
    noop = start([sys.executable, "-m", "uvicorn", "tests.bench.noop_app:app", "--port", str(noop_port),
                  "--log-level", "warning"], noop_url, env)
    h = {"Authorization": f"Bearer {SECRET}"}
    try:
        with httpx.Client(base_url=ours_url, headers=h, timeout=60) as c, \
                httpx.Client(base_url=noop_url, timeout=60) as n:
            r = c.post("/v1/channels", json={"id": "bench.c1", "inputs": [{"name": "raw", "min": 0, "max": 100}],
                                             "basis": {"kind": "poly", "degree": 3}})
            assert r.status_code == 201, r.text
            path = "/v1/channels/bench.c1/samples"
            print(f"{'batch':>6} {'ours samples/s':>15} {'no-op samples/s':>16} {'ratio':>6}")
            seq = 0
            results = {}
            for batch, requests in plan.items():
                ours_rates, noop_rates = [], []
                for _ in range(rounds):  # interleaved, so both see the same machine load
                    ours_rates.append(drive(c, path, batch, requests, seq))
                    seq += batch * requests
                    noop_rates.append(drive(n, path, batch, requests, 0))
                o, b = statistics.median(ours_rates), statistics.median(noop_rates)
                results[batch] = (o, b)
                print(f"{batch:>6} {o:>15,.0f} {b:>16,.0f} {o / b:>6.2f}")
            print()
            for size in (1, 10_000):
                xs = [float(i % 100) for i in range(size)]
                lat = []
                for _ in range(200 if size == 1 else 40):
                    t0 = time.perf_counter()
                    r = c.post("/v1/channels/bench.c1/predict", json={"x": xs})
                    lat.append((time.perf_counter() - t0) * 1e3)
                    assert r.status_code == 200
                lat.sort()
                p50 = lat[len(lat) // 2]
                p99 = lat[min(len(lat) - 1, int(len(lat) * 0.99))]
                print(f"predict {size:>6} values: p50 {p50:7.2f} ms   p99 {p99:7.2f} ms")
    finally:
        for proc in (ours, noop):
            proc.terminate()
            proc.wait(timeout=10)


if __name__ == "__main__":
    main()
