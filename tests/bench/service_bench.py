"""Service benchmark: a real ``curvekeeper serve`` process (SQLite, durable commits) next to a
no-op FastAPI app served the same way (uvicorn, one process) that parses the same bodies,
driven by httpx clients (keep-alive) from this process, in interleaved rounds so both see
the same machine load. Figures are medians of the rounds.

1. ingest samples/s by batch size into one channel, and 4 client threads posting single
   samples each to its own channel (do commits of concurrent requests overlap?);
2. predict latency for 1 and 10,000 values;
3. ingest and predict with 100, 10,000 and 100,000 channels in the store, seeded in bulk
   through the store layer before the servers start (one channel made by the service's own
   actions, its rows copied for the others with the id changed);
4. memory per channel: database bytes at rest, and server RSS growth per channel touched;
5. replay speed of ``curvekeeper replay --check``.

Run: ``python -m tests.bench.service_bench [--size smoke|quick|full] [--out DIR]``.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import socket
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import httpx

from .report import Table, figure, percentile, save, section_main

SECRET = "ck_bench-admin-secret-0123456789"
AUTH = {"Authorization": f"Bearer {SECRET}", "Content-Type": "application/json"}
JSON = {"Content-Type": "application/json"}
CHANNEL: dict[str, Any] = {"inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
                           "output": {"unit": "V"}, "basis": {"kind": "poly", "degree": 3}}
SEED_KEY = "bench-seed"
SEED_SAMPLES = 3  # samples learned by every seeded channel
CACHE_SIZE = 4096  # decoded models the server keeps (curvekeeper.actions.unit.CACHE_SIZE)


@dataclass(frozen=True)
class Plan:
    rounds: int
    batches: dict[int, int]  # samples per request -> requests per round
    thread_requests: int  # single-sample requests per client thread per round (4 threads)
    predict: dict[int, int]  # values per request -> requests per round
    stores: tuple[int, ...]  # channels in each seeded store
    store_ingest: dict[int, int]  # on the seeded stores: samples per request -> requests per round
    store_predict: int  # 1-value predicts per round and store, on one channel and on random channels
    touch: tuple[int, ...]  # channels touched (cumulative) before each RSS reading
    replay_samples: int
    replay_runs: int  # runs of each replay command


PLANS = {
    "smoke": Plan(rounds=2, batches={1: 6, 10: 4, 100: 3, 1000: 2, 10_000: 1}, thread_requests=4,
                  predict={1: 10, 10_000: 2}, stores=(100, 300), store_ingest={1: 5, 1000: 1}, store_predict=8,
                  touch=(20, 60), replay_samples=2_000, replay_runs=1),
    "quick": Plan(rounds=3, batches={1: 60, 10: 40, 100: 15, 1000: 3, 10_000: 1}, thread_requests=25,
                  predict={1: 60, 10_000: 6}, stores=(100, 1_000, 10_000), store_ingest={1: 30, 1000: 2},
                  store_predict=40, touch=(1_000, 2_000, 4_000), replay_samples=20_000, replay_runs=2),
    "full": Plan(rounds=5, batches={1: 200, 10: 120, 100: 40, 1000: 8, 10_000: 2}, thread_requests=40,
                 predict={1: 100, 10_000: 8}, stores=(100, 10_000, 100_000), store_ingest={1: 80, 1000: 4},
                 store_predict=100, touch=(1_000, 2_000, 3_000, 4_500, 6_000), replay_samples=50_000, replay_runs=3),
}


# ---------------------------------------------------------------------------------------------
# bodies

def reading(seq: int) -> dict[str, Any]:
    """One sample: raw x in [0, 100), reference y on a smooth cubic, the source's seq."""
    x = (seq * 37 % 1000) / 10.0
    s = x / 50.0 - 1.0
    return {"x": x, "y": 1.0 + 0.5 * s - 0.2 * s * s + 0.1 * s ** 3, "seq": seq}


def samples_body(batch: int, seq0: int) -> bytes:
    return json.dumps({"source": "bench", "samples": [reading(seq0 + i) for i in range(batch)]}).encode()


def predict_body(n: int) -> bytes:
    return json.dumps({"x": [float(i % 100) + 0.5 for i in range(n)]}).encode()


class Seqs:
    """Fresh source sequence numbers per channel, so no posted sample is a duplicate."""

    def __init__(self) -> None:
        self.next: dict[str, int] = {}

    def bodies(self, channel: str, batch: int, requests: int) -> list[bytes]:
        s = self.next.get(channel, 0)
        self.next[channel] = s + batch * requests
        return [samples_body(batch, s + r * batch) for r in range(requests)]


# ---------------------------------------------------------------------------------------------
# servers

def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Server:
    name: str
    proc: subprocess.Popen[bytes]
    url: str
    probe: str
    log: Path

    def rss(self) -> int:
        """Resident set size of the server process, bytes (VmRSS)."""
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
        raise RuntimeError("no VmRSS")


@dataclass
class Fleet:
    """The server processes of one run; ``stop`` ends every one of them."""

    tmp: Path
    servers: list[Server] = field(default_factory=list)

    def spawn(self, name: str, args: list[str], probe: str, env: dict[str, str] | None = None) -> Server:
        port = free_port()
        log = self.tmp / f"{name}.log"
        with log.open("wb") as f:
            proc = subprocess.Popen([sys.executable, "-m", *args, "--port", str(port)],
                                    env={**os.environ, "CURVEKEEPER_ADMIN_KEY": SECRET, **(env or {})},
                                    stdout=subprocess.DEVNULL, stderr=f)
        server = Server(name, proc, f"http://127.0.0.1:{port}", probe, log)
        self.servers.append(server)
        return server

    def wait_ready(self, timeout_s: float = 90.0) -> None:
        deadline = time.monotonic() + timeout_s
        for s in self.servers:
            while True:
                if s.proc.poll() is not None:
                    raise RuntimeError(f"{s.name} exited: {s.log.read_text()[-2000:]}")
                try:
                    if httpx.get(s.url + s.probe, timeout=1).status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                if time.monotonic() > deadline:
                    raise RuntimeError(f"{s.name} did not start: {s.log.read_text()[-2000:]}")
                time.sleep(0.1)

    def stop(self) -> None:
        for s in self.servers:
            if s.proc.poll() is None:
                s.proc.terminate()
        for s in self.servers:
            try:
                s.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                s.proc.kill()
                s.proc.wait()


def serve(fleet: Fleet, name: str, db: Path) -> Server:
    return fleet.spawn(name, ["curvekeeper.cli", "serve", "--db", f"sqlite:///{db}"], "/readyz")


def post(client: httpx.Client, path: str, body: bytes) -> httpx.Response:
    r = client.post(path, content=body)
    if r.status_code != 200:
        raise RuntimeError(f"{path}: {r.status_code} {r.text[:500]}")
    return r


def alternate(targets: dict[Any, tuple[httpx.Client, list[tuple[str, bytes]]]]) -> dict[Any, list[float]]:
    """Post request r of every target before request r + 1 of any (the order turning each
    time), so all targets see the same machine load; the latency of each request, ms."""
    keys = list(targets)
    out: dict[Any, list[float]] = {k: [] for k in keys}
    for r in range(max(len(reqs) for _, reqs in targets.values())):
        for k in keys[r % len(keys):] + keys[:r % len(keys)]:
            client, reqs = targets[k]
            if r < len(reqs):
                t0 = time.perf_counter()
                post(client, *reqs[r])
                out[k].append((time.perf_counter() - t0) * 1e3)
    return out


def rate(batch: int, ms: list[float]) -> float:
    """Samples/s of requests of ``batch`` samples that took ``ms`` each."""
    return batch * len(ms) / sum(ms) * 1e3


def latencies(client: httpx.Client, paths: list[str], body: bytes) -> list[float]:
    """Latency of each request, ms."""
    out = []
    for p in paths:
        t0 = time.perf_counter()
        post(client, p, body)
        out.append((time.perf_counter() - t0) * 1e3)
    return out


def concurrent(clients: list[httpx.Client], paths: list[str], bodies: list[list[bytes]]) -> float:
    """Samples/s of single-sample requests, one thread per client, each on its own path."""
    start = threading.Barrier(len(clients) + 1)
    errors: list[BaseException] = []

    def work(k: int) -> None:
        start.wait()
        try:
            for b in bodies[k]:
                post(clients[k], paths[k], b)
        except BaseException as exc:  # reported after the join
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(k,)) for k in range(len(clients))]
    for t in threads:
        t.start()
    start.wait()
    t0 = time.perf_counter()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - t0
    if errors:
        raise errors[0]
    return sum(len(b) for b in bodies) / elapsed


# ---------------------------------------------------------------------------------------------
# seeding and sizes

def channel_id(i: int) -> str:
    return f"fleet.c{i:06d}"


def seed(db: Path, n: int, chunk: int = 10_000) -> float:
    """Make a store of ``n`` channels with ``SEED_SAMPLES`` samples each; seconds taken.

    The first channel is made by the service's own actions (create, then ingest); the
    others copy its channel, state, sample and event rows in bulk, with their own id in the
    config (in the channel row, the model state and the creation event), a few big
    transactions in all. Replaying any of them gives its stored state back."""
    from curvekeeper.actions import channels, samples
    from curvekeeper.actions.samples import SampleIn
    from curvekeeper.actions.unit import Work
    from curvekeeper.store import Store
    from curvekeeper.store.tables import Channel, ChannelState, Event, Sample, utcnow
    from sqlalchemy import insert, select

    t0 = time.perf_counter()
    store = Store(f"sqlite:///{db}")
    try:
        first = channel_id(0)
        with Work(store).unit(write=True) as unit:
            channels.create(unit.repo, {"id": first, **CHANNEL}, SEED_KEY)
            rs = [reading(k) for k in range(SEED_SAMPLES)]
            samples.ingest(unit, first, [SampleIn(r["x"], r["y"], seq=r["seq"]) for r in rs], "seed", SEED_KEY)
        tables = {name: cast(Any, t.__table__) for name, t in
                  (("channel", Channel), ("state", ChannelState), ("sample", Sample), ("event", Event))}
        rows: dict[str, list[dict[str, Any]]] = {}
        with store.transaction(write=False) as repo:
            conn = repo.session.connection()
            pk = conn.execute(select(tables["channel"].c.pk).where(tables["channel"].c.id == first)).scalar_one()
            for name, t in tables.items():
                where = t.c.pk == pk if name == "channel" else t.c.channel_pk == pk
                rows[name] = [dict(r._mapping) for r in conn.execute(select(t).where(where))]
        for r in rows["sample"] + rows["event"]:
            del r["pk"]
        now = utcnow()
        for r in rows["event"]:
            r["at"] = now

        def copy(r: dict[str, Any], i: int, column: str) -> dict[str, Any]:
            """A row of channel ``i``: its channel pk, and its id in the config inside ``column``."""
            out = {**r, "pk": pk + i, "id": channel_id(i)} if "id" in r else {**r, "channel_pk": pk + i}
            inner = out[column]
            if column == "config":
                out[column] = {**inner, "id": channel_id(i)}
            elif isinstance(inner, dict) and "config" in inner:
                out[column] = {**inner, "config": {**inner["config"], "id": channel_id(i)}}
            return out

        columns = {"channel": "config", "state": "model_state", "sample": "x", "event": "details"}
        for lo in range(1, n, chunk):
            ids = range(lo, min(n, lo + chunk))
            with store.transaction(write=True) as repo:
                conn = repo.session.connection()
                for name, t in tables.items():
                    conn.execute(insert(t), [copy(r, i, columns[name]) for i in ids for r in rows[name]])
    finally:
        store.dispose()
    return time.perf_counter() - t0


def file_bytes(db: Path) -> int:
    """The database file plus its write-ahead log, bytes."""
    wal = Path(str(db) + "-wal")
    return db.stat().st_size + (wal.stat().st_size if wal.exists() else 0)


def used_bytes(db: Path) -> int:
    """Pages in use by the database as a reader sees it now (WAL included), bytes."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        size = con.execute("PRAGMA page_size").fetchone()[0]
        pages = con.execute("PRAGMA page_count").fetchone()[0]
        free = con.execute("PRAGMA freelist_count").fetchone()[0]
    finally:
        con.close()
    return int(size * (pages - free))


def replay_seconds(db: Path, channel: str) -> float:
    """Wall time of ``curvekeeper replay <channel> --check --quiet``, process start included, seconds."""
    t0 = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "curvekeeper.cli", "replay", channel, "--check", "--quiet",
                        "--db", f"sqlite:///{db}"], capture_output=True, text=True, timeout=600)
    took = time.perf_counter() - t0
    if r.returncode != 0 or "bit for bit" not in r.stdout:
        raise RuntimeError(f"replay {channel}: exit {r.returncode}: {r.stdout[-500:]} {r.stderr[-1500:]}")
    return took


# ---------------------------------------------------------------------------------------------
# the run

def med(values: list[float]) -> float:
    return statistics.median(values)


def run(size: str, out: Path) -> dict[str, Any]:
    plan = PLANS[size]
    tmp = Path(tempfile.mkdtemp(prefix="ck-service-bench-"))
    fleet = Fleet(tmp)
    try:
        return _run(plan, tmp, fleet, out)
    finally:
        fleet.stop()
        shutil.rmtree(tmp, ignore_errors=True)


def _run(plan: Plan, tmp: Path, fleet: Fleet, out: Path) -> dict[str, Any]:
    rng = random.Random(7)
    rounds = plan.rounds
    tables: list[Table] = []
    headline: dict[str, Any] = {}
    phases: dict[str, float] = {}
    clock = [time.perf_counter()]

    def lap(name: str) -> None:
        now = time.perf_counter()
        phases[name] = round(now - clock[0], 1)
        clock[0] = now

    # seeded stores, then every server at once (their start-ups overlap)
    seeded: dict[int, dict[str, Any]] = {}
    for n in plan.stores:
        db = tmp / f"fleet{n}.db"
        took = seed(db, n)
        seeded[n] = {"db": db, "seconds": took, "bytes": file_bytes(db)}
    lap("seeding")
    main = serve(fleet, "main", tmp / "main.db")
    stores = {n: serve(fleet, f"store{n}", seeded[n]["db"]) for n in plan.stores}
    noop = fleet.spawn("noop", ["uvicorn", "tests.bench.noop_app:app", "--log-level", "warning"], "/docs")
    fleet.wait_ready()
    lap("start-up")

    seqs = Seqs()
    c = httpx.Client(base_url=main.url, headers=AUTH, timeout=120)
    z = httpx.Client(base_url=noop.url, headers=JSON, timeout=120)
    threads = 4
    tc = [httpx.Client(base_url=main.url, headers=AUTH, timeout=120) for _ in range(threads)]
    tz = [httpx.Client(base_url=noop.url, headers=JSON, timeout=120) for _ in range(threads)]
    sc = {n: httpx.Client(base_url=s.url, headers=AUTH, timeout=120) for n, s in stores.items()}
    opened = [c, z, *tc, *tz, *sc.values()]
    try:
        for cid in ("bench.ingest", "bench.replay", "bench.small", *(f"bench.t{k}" for k in range(threads))):
            r = c.post("/v1/channels", json={"id": cid, **CHANNEL})
            if r.status_code != 201:
                raise RuntimeError(r.text)
        for cl in (c, z, *tc, *tz, *sc.values()):  # open the keep-alive connections
            cl.post("/v1/channels/bench.t0/predict", content=predict_body(1))

        # 1. ingest by batch size, ours and no-op on the same bodies
        path = "/v1/channels/bench.ingest/samples"
        batch_rates: dict[int, tuple[float, float]] = {}
        for batch, requests in plan.batches.items():
            ours, base = [], []
            for _ in range(rounds):
                reqs = [(path, b) for b in seqs.bodies("bench.ingest", batch, requests)]
                ms = alternate({"ours": (c, reqs), "no-op": (z, reqs)})
                ours.append(rate(batch, ms["ours"]))
                base.append(rate(batch, ms["no-op"]))
            batch_rates[batch] = (med(ours), med(base))
        t = Table("Ingest into one channel (durable commits): samples/s, median of rounds",
                  ["batch", "requests/round", "ours samples/s", "no-op samples/s", "ours / no-op",
                   "ours ms/request"])
        for batch, (o, b) in batch_rates.items():
            t.add(batch, plan.batches[batch], o, b, o / b, batch / o * 1e3)
            headline[f"ratio_batch{batch}"] = round(o / b, 4)
            headline[f"samples_per_s_batch{batch}"] = round(o, 1)

        # 1b. four client threads, single samples, each on its own channel
        tpaths = [f"/v1/channels/bench.t{k}/samples" for k in range(threads)]
        ours, base = [], []
        for _ in range(rounds):
            bodies = [seqs.bodies(f"bench.t{k}", 1, plan.thread_requests) for k in range(threads)]
            ours.append(concurrent(tc, tpaths, bodies))
            base.append(concurrent(tz, tpaths, bodies))
        conc = (med(ours), med(base))
        single = batch_rates[1][0]
        t.add(f"1 x {threads} threads", plan.thread_requests * threads, conc[0], conc[1], conc[0] / conc[1],
              threads / conc[0] * 1e3)
        t.show()
        tables.append(t)
        headline.update(concurrent_samples_per_s=round(conc[0], 1), ratio_concurrent=round(conc[0] / conc[1], 4),
                        concurrent_over_single=round(conc[0] / single, 3))
        print(f"  {threads} threads give {conc[0] / single:.2f} x the single-client rate of batch 1 "
              f"(no-op: {conc[1] / batch_rates[1][1]:.2f} x)")

        lap("ingest")

        # 2. predict latency
        lat: dict[int, tuple[list[float], list[float]]] = {n: ([], []) for n in plan.predict}
        for _ in range(rounds):
            for n, requests in plan.predict.items():
                reqs = [("/v1/channels/bench.ingest/predict", predict_body(n))] * requests
                ms = alternate({"ours": (c, reqs), "no-op": (z, reqs)})
                lat[n][0].extend(ms["ours"])
                lat[n][1].extend(ms["no-op"])
        t = Table("Predict latency, ms (all rounds' requests)",
                  ["values", "requests", "ours p50", "ours p99", "no-op p50", "no-op p99", "ours values/s"])
        for n, (o, b) in lat.items():
            t.add(n, len(o), percentile(o, 50), percentile(o, 99), percentile(b, 50), percentile(b, 99),
                  n / percentile(o, 50) * 1e3)
            key = "predict1" if n == 1 else f"predict{n // 1000}k"
            headline[f"{key}_p50_ms"] = round(percentile(o, 50), 3)
            headline[f"{key}_p99_ms"] = round(percentile(o, 99), 3)
        t.show()
        tables.append(t)

        lap("predict")

        # 3. many channels: one measured channel in each store, predicts also on random channels;
        # each request to one store is followed by one to every other store (and the no-op app)
        touch_max = max(plan.touch)
        largest = max(plan.stores)
        hot = {n: channel_id(n // 2) for n in plan.stores}
        per: dict[Any, dict[str, list[float]]] = {n: {"i1": [], "i1000": [], "p": [], "pr": []}
                                                  for n in (*plan.stores, "no-op")}
        one = predict_body(1)
        cached = {hot[largest]}  # channels of the largest store whose models the server may hold
        for _ in range(rounds):
            for batch, requests in plan.store_ingest.items():
                targets = {n: (sc[n], [(f"/v1/channels/{hot[n]}/samples", b)
                                       for b in seqs.bodies(f"{n}:{hot[n]}", batch, requests)])
                           for n in plan.stores}
                ms = alternate({**targets, "no-op": (z, targets[largest][1])})
                for key, v in ms.items():
                    per[key][f"i{batch}"].append(rate(batch, v))
            ms = alternate({**{n: (sc[n], [(f"/v1/channels/{hot[n]}/predict", one)] * plan.store_predict)
                               for n in plan.stores},
                            "no-op": (z, [("/v1/channels/x/predict", one)] * plan.store_predict)})
            for key, v in ms.items():
                per[key]["p"].extend(v)
            # random channels, leaving the top ``touch_max`` of the largest store untouched for part 4
            top = {n: n - touch_max if n == largest and n > 2 * touch_max else n for n in plan.stores}
            picks = {n: [channel_id(rng.randrange(top[n])) for _ in range(plan.store_predict)] for n in plan.stores}
            cached.update(picks[largest])
            ms = alternate({n: (sc[n], [(f"/v1/channels/{cid}/predict", one) for cid in picks[n]])
                            for n in plan.stores})
            for key, v in ms.items():
                per[key]["pr"].extend(v)
        t = Table(f"Channels in the store ({SEED_SAMPLES} samples each): ingest on one channel among them, "
                  "predict 1 value on that channel (hot) and on a random one",
                  ["channels", "seed s", "db MB", "ingest b1 samples/s", "ingest b1000 samples/s",
                   "predict hot p50 ms", "p99", "predict random p50 ms", "p99"])
        summary: dict[Any, dict[str, float]] = {}
        for key, m in per.items():
            row = {"i1": med(m["i1"]), "i1000": med(m["i1000"]), "p50": percentile(m["p"], 50),
                   "p99": percentile(m["p"], 99)}
            if m["pr"]:
                row.update(pr50=percentile(m["pr"], 50), pr99=percentile(m["pr"], 99))
            summary[key] = row
            s = seeded.get(key)
            t.add(f"{key:,}" if isinstance(key, int) else key, s["seconds"] if s else "",
                  s["bytes"] / 1e6 if s else "", row["i1"], row["i1000"], row["p50"], row["p99"],
                  row.get("pr50", ""), row.get("pr99", ""))
        lo, hi = summary[min(plan.stores)], summary[largest]
        ratios = {"ingest1": lo["i1"] / hi["i1"], "ingest1000": lo["i1000"] / hi["i1000"],
                  "predict1": hi["p50"] / lo["p50"], "predict1_random": hi["pr50"] / lo["pr50"]}
        t.add(f"cost {largest:,} / {min(plan.stores):,}", "", "", ratios["ingest1"], ratios["ingest1000"],
              ratios["predict1"], hi["p99"] / lo["p99"], ratios["predict1_random"], hi["pr99"] / lo["pr99"])
        t.show()
        tables.append(t)
        seed_s = sum(s["seconds"] for s in seeded.values())
        seed_n = sum(plan.stores)
        print(f"  seeding {seed_n:,} channels took {seed_s:.1f} s ({seed_n / seed_s:,.0f} channels/s); "
              "cost ratios are time per sample or p50 latency at the largest store over the smallest")
        headline.update({f"channels_ratio_{k}": round(v, 3) for k, v in ratios.items()})
        headline.update(seed_seconds=round(seed_s, 1), seed_channels=seed_n,
                        seed_channels_per_s=round(seed_n / seed_s, 0))

        lap("channels")

        # 4. memory per channel: at rest, and in flight after touching K channels
        big = seeded[largest]["bytes"]
        small_n = min(plan.stores)
        small = seeded[small_n]["bytes"]
        per_channel = (big - small) / (largest - small_n)
        rss: list[tuple[int, int]] = []
        server = stores[largest]
        before = server.rss()
        done = 0
        order = [channel_id(largest - 1 - k) for k in range(touch_max)]
        for k in plan.touch:
            latencies(sc[largest], [f"/v1/channels/{cid}/predict" for cid in order[done:k]], one)
            done = k
            rss.append((k, server.rss()))

        lap("memory")

        # 5. replay: a long channel and a short one (the process start-up), on the main store
        used0 = used_bytes(tmp / "main.db")
        for b in seqs.bodies("bench.replay", 10_000, plan.replay_samples // 10_000):
            post(c, "/v1/channels/bench.replay/samples", b)
        rest = plan.replay_samples % 10_000
        if rest:
            post(c, "/v1/channels/bench.replay/samples", seqs.bodies("bench.replay", rest, 1)[0])
        per_sample = (used_bytes(tmp / "main.db") - used0) / plan.replay_samples
        post(c, "/v1/channels/bench.small/samples", seqs.bodies("bench.small", SEED_SAMPLES, 1)[0])
        runs = plan.replay_runs
        pairs = [(replay_seconds(tmp / "main.db", "bench.small"), replay_seconds(tmp / "main.db", "bench.replay"))
                 for _ in range(runs)]  # short and long runs alternate, so both see the same load
        t_small, t_long = med([a for a, _ in pairs]), med([b for _, b in pairs])
        t_diff = med([b - a for a, b in pairs])
        replay_seconds(seeded[largest]["db"], channel_id(largest // 3))  # a copied channel replays to its state

        t = Table("Memory per channel", ["what", "count", "bytes", "bytes each"])
        for n in plan.stores:
            t.add(f"database file, store of {n:,} channels", n, seeded[n]["bytes"], seeded[n]["bytes"] / n)
        t.add(f"database, each added channel with {SEED_SAMPLES} samples", largest - small_n, big - small,
              per_channel)
        t.add("database, each added sample (long channel)", plan.replay_samples,
              per_sample * plan.replay_samples, per_sample)
        t.add("database, each added channel without samples", largest - small_n, "",
              per_channel - SEED_SAMPLES * per_sample)
        prev_k, prev = 0, before
        for k, r in rss:
            t.add(f"server RSS growth, channels {prev_k:,}-{k:,} touched", k - prev_k, r - prev,
                  (r - prev) / (k - prev_k))
            prev_k, prev = k, r
        fill = [(k, r) for k, r in rss if k <= CACHE_SIZE - len(cached)]
        rss_each = (fill[-1][1] - before) / fill[-1][0] if fill else (rss[0][1] - before) / rss[0][0]
        t.show()
        tables.append(t)
        print(f"  server RSS {before / 1e6:.0f} MB before touching, {rss[-1][1] / 1e6:.0f} MB after {rss[-1][0]:,} "
              f"channels (1-value predict each, store of {largest:,}); the server keeps at most {CACHE_SIZE:,} "
              f"decoded models (LRU by channel, one version each), {len(cached):,} of them held before touching")
        headline.update(db_bytes_per_channel=round(per_channel, 1), db_bytes_per_sample=round(per_sample, 1),
                        rss_bytes_per_channel=round(rss_each, 0))

        lap("replay")
        replay_rate = plan.replay_samples / t_diff if t_diff > 0 else None  # None: lost in the start-up noise
        t = Table("Replay with --check (a process each run; the run on a channel of "
                  f"{SEED_SAMPLES} samples before each long run is subtracted: start-up)",
                  ["channel samples", "runs", "wall s (median)", "replay samples/s (median of differences)"])
        t.add(SEED_SAMPLES, runs, t_small, "")
        t.add(plan.replay_samples, runs, t_long, "" if replay_rate is None else replay_rate)
        t.show()
        tables.append(t)
        headline.update(replay_samples_per_s=replay_rate and round(replay_rate, 0), replay_startup_s=round(t_small, 3))
        print("  phases, s: " + ", ".join(f"{k} {v}" for k, v in phases.items()))
    finally:
        for cl in opened:
            cl.close()

    figures = [_fig_batches(out, batch_rates, conc, threads), _fig_channels(out, plan, summary, largest),
               _fig_rss(out, before, rss, CACHE_SIZE - len(cached))]
    return {"tables": [t.to_json() for t in tables], "figures": figures, "headline": headline, "phases_s": phases}


# ---------------------------------------------------------------------------------------------
# figures

def _fig_batches(out: Path, rates: dict[int, tuple[float, float]], conc: tuple[float, float], threads: int) -> str:
    fig, ax = figure("Ingest into one channel: samples/s by batch size", "samples per request", "samples/s",
                     log=True)
    xs = list(rates)
    ax.plot(xs, [rates[b][0] for b in xs], "o-", label="curvekeeper (durable commits)")
    ax.plot(xs, [rates[b][1] for b in xs], "s--", label="no-op route (same bodies)")
    ax.plot([1], [conc[0]], "^", color="C0", markersize=9, label=f"curvekeeper, {threads} client threads")
    ax.plot([1], [conc[1]], "v", color="C1", markersize=9, label=f"no-op, {threads} client threads")
    ax.legend()
    return save(fig, out, "service_ingest_batch")


def _fig_channels(out: Path, plan: Plan, summary: dict[Any, dict[str, float]], largest: int) -> str:
    fig, ax = figure("Cost per request vs channels in the store", "channels in the store", "ms per request",
                     log=True)
    ns = list(plan.stores)
    ax.plot(ns, [1e3 / summary[n]["i1"] for n in ns], "o-", label="ingest, 1 sample")
    ax.plot(ns, [1e3 * 1000 / summary[n]["i1000"] for n in ns], "s-", label="ingest, 1,000 samples")
    ax.plot(ns, [summary[n]["p50"] for n in ns], "^-", label="predict 1 value, same channel (p50)")
    ax.plot(ns, [summary[n]["pr50"] for n in ns], "v-", label="predict 1 value, random channel (p50)")
    ax.legend()
    return save(fig, out, "service_channels")


def _fig_rss(out: Path, before: int, rss: list[tuple[int, int]], full_at: int) -> str:
    fig, ax = figure("Server memory vs channels touched (1-value predict each)", "channels touched",
                     "RSS growth, MB")
    ax.plot([0, *[k for k, _ in rss]], [0, *[(r - before) / 1e6 for _, r in rss]], "o-")
    ax.axvline(full_at, color="grey", linestyle=":", label=f"model cache full ({CACHE_SIZE:,} models)")
    ax.legend()
    return save(fig, out, "service_rss")


if __name__ == "__main__":
    section_main(run, __doc__)
