"""Store benchmark: ingest samples/s with 1, 2 and 4 ``curvekeeper serve`` processes on one
PostgreSQL store, and with 1 process on SQLite, in the same run, against many channels.

Client processes post batches of ``--batch`` samples to random channels, spread over the
servers, with durable commits. Run (needs a PostgreSQL server; the URL's database is
emptied): ``python -m tests.bench.store_bench --pg postgresql+psycopg://postgres@127.0.0.1:5432/ck_bench``.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import random
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

SECRET = "ck_bench-admin-secret-0123456789"
H = {"Authorization": f"Bearer {SECRET}"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def serve(db: str, port: int) -> subprocess.Popen[bytes]:
    env = {**os.environ, "CURVEKEEPER_ADMIN_KEY": SECRET}
    proc = subprocess.Popen([sys.executable, "-m", "curvekeeper.cli", "serve", "--port", str(port), "--db", db],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1).status_code == 200:
                return proc
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    proc.kill()
    raise RuntimeError("server did not start")


def client(urls: list[str], channels: int, batch: int, requests: int, seed: int, out: mp.Queue) -> None:  # type: ignore[type-arg]
    rng = random.Random(seed)
    clients = [httpx.Client(base_url=u, headers=H, timeout=60) for u in urls]
    seq = seed * 10**9
    t0 = time.perf_counter()
    sent = 0
    for r in range(requests):
        c = clients[r % len(clients)]
        ch = f"bench.c{rng.randrange(channels)}"
        body = {"source": f"client{seed}", "samples": [
            {"x": rng.uniform(0, 100), "y": rng.uniform(0, 3), "seq": seq + i} for i in range(batch)]}
        seq += batch
        while True:
            resp = c.post(f"/v1/channels/{ch}/samples", json=body)
            if resp.status_code == 200:
                break
            if resp.status_code != 503:
                raise RuntimeError(resp.text)
            time.sleep(float(resp.headers.get("Retry-After", "0.05")) / 10)
        sent += batch
    out.put((sent, time.perf_counter() - t0))


def run(db: str, processes: int, channels: int, batch: int, requests: int, clients: int) -> float:
    ports = [free_port() for _ in range(processes)]
    procs = [serve(db, p) for p in ports]
    urls = [f"http://127.0.0.1:{p}" for p in ports]
    try:
        with httpx.Client(base_url=urls[0], headers=H, timeout=60) as c:
            for i in range(channels):
                r = c.post("/v1/channels", json={"id": f"bench.c{i}",
                                                 "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
                                                 "output": {"unit": "V"},
                                                 "basis": {"kind": "poly", "degree": 3}})
                assert r.status_code in (201, 409), r.text
        q: mp.Queue = mp.Queue()  # type: ignore[type-arg]
        workers = [mp.Process(target=client, args=(urls, channels, batch, requests, k + 1, q)) for k in range(clients)]
        t0 = time.perf_counter()
        for w in workers:
            w.start()
        results = [q.get() for _ in workers]
        elapsed = time.perf_counter() - t0
        for w in workers:
            w.join()
        return sum(n for n, _ in results) / elapsed
    finally:
        for p in procs:
            p.terminate()
            p.wait(timeout=10)


def reset_pg(url: str) -> None:
    admin = create_engine(make_url(url).set(database="postgres"), isolation_level="AUTOCOMMIT")
    name = make_url(url).database
    with admin.connect() as conn:
        conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
        conn.execute(text(f"CREATE DATABASE {name}"))
    admin.dispose()


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__)
    p.add_argument("--pg", help="PostgreSQL URL of a database this benchmark may drop and create")
    p.add_argument("--channels", type=int, default=200)
    p.add_argument("--batch", type=int, default=100)
    p.add_argument("--requests", type=int, default=150, help="per client process")
    p.add_argument("--clients", type=int, default=4)
    args = p.parse_args()
    print(f"{args.clients} client processes x {args.requests} requests of {args.batch} samples, "
          f"{args.channels} channels\n")
    print(f"{'store':12} {'processes':>9} {'samples/s':>10}")
    tmp = Path(tempfile.mkdtemp())
    rate = run(f"sqlite:///{tmp / 'bench.db'}", 1, args.channels, args.batch, args.requests, args.clients)
    print(f"{'SQLite':12} {1:>9} {rate:>10,.0f}")
    if args.pg:
        for n in (1, 2, 4):
            reset_pg(args.pg)
            rate = run(args.pg, n, args.channels, args.batch, args.requests, args.clients)
            print(f"{'PostgreSQL':12} {n:>9} {rate:>10,.0f}")


if __name__ == "__main__":
    main()
