"""Ingest at the speed of the web layer: the service's ingest targets, each measured side by
side in one run (interleaved requests, medians, ratios) and stated as met, missed or skipped.

| measure | target |
| --- | --- |
| batch of 1,000, columnar body | 0.6x or more of the no-op route parsing the same body |
| durable samples/s at batch 10,000 | 100,000 or more |
| single-sample requests | 0.6x or more of the no-op route |
| predict p99 while another client ingests batches | at most 3x its idle p99 |
| start to ready, warm kernel cache | 3 s or less |
| two service processes on PostgreSQL against one | 1.6x the ingest throughput or more |

A real ``curvekeeper serve`` (SQLite, durable commits) and the no-op app
(``tests/bench/noop_app.py``) are driven with keep-alive httpx clients. The columnar body is
built in one place (``columnar_body``); a server that answers 422 to it (one without the
columnar form) skips that measure with the reason. Load for the predict measure comes from
another process (its JSON work must not slow the measuring client). The PostgreSQL measure
makes its own database on 127.0.0.1:5432 and drops it; without a server there it is skipped.

Run: ``python -m tests.bench --only ingest [--size smoke|quick|full]``
(or ``python -m tests.bench.ingest_bench``: tables only).
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import random
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx

from .report import Table, figure, percentile, save, section_main
from .service_bench import AUTH, CHANNEL, JSON, SECRET, Fleet, alternate, free_port, predict_body, rate, reading

PG_ADMIN = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"

#: the targets, in the order of the table: key -> (measure, target as said, bound, "min" or "max")
TARGETS: dict[str, tuple[str, str, float, str]] = {
    "columnar_1000": ("batch of 1,000, columnar body: ours / no-op samples/s", ">= 0.6x", 0.6, "min"),
    "durable_10000": ("durable samples/s at batch 10,000", ">= 100,000", 100_000.0, "min"),
    "single": ("single-sample requests: ours / no-op requests/s", ">= 0.6x", 0.6, "min"),
    "predict_under_ingest": ("predict p99 while another client ingests: loaded / idle", "<= 3x", 3.0, "max"),
    "start_ready": ("start to ready, warm kernel cache: s (median)", "<= 3 s", 3.0, "max"),
    "pg_two_processes": ("two service processes on PostgreSQL / one: samples/s", ">= 1.6x", 1.6, "min"),
}


@dataclass(frozen=True)
class Plan:
    rounds: int
    columnar: int  # batches of 1,000 per round, to each server
    big: int  # batches of 10,000 per round
    single: int  # single-sample requests per round, to each server
    predicts: int  # 1-value predicts per round, idle and again under load
    starts: int  # start-ups timed
    pg_rounds: int
    pg_clients: int  # client processes
    pg_requests: int  # requests per client process per round
    pg_channels: int


PLANS = {
    "smoke": Plan(rounds=2, columnar=2, big=1, single=10, predicts=20, starts=2, pg_rounds=1, pg_clients=2,
                  pg_requests=5, pg_channels=4),
    "quick": Plan(rounds=3, columnar=6, big=2, single=100, predicts=150, starts=3, pg_rounds=2, pg_clients=4,
                  pg_requests=40, pg_channels=20),
    "full": Plan(rounds=5, columnar=10, big=3, single=300, predicts=400, starts=5, pg_rounds=3, pg_clients=4,
                 pg_requests=80, pg_channels=40),
}

PG_BATCH = 100  # samples per request in the PostgreSQL measure
LOAD_BATCHES = (1_000, 10_000)  # the loading client's batches, in turn (the row form: the most parsing work)


# ---------------------------------------------------------------------------------------------
# bodies

def columnar_body(xs: list[float], ys: list[float], seqs: list[int]) -> dict[str, Any]:
    """The columnar samples body: THE one place its field names are written (the answer asked
    for is the short one, counts and a summary of the residuals, not one residual a sample)."""
    return {"source": "bench", "columns": {"x": xs, "y": ys, "seq": seqs}, "answer": "summary"}


def columnar(batch: int, seq0: int) -> bytes:
    rs = [reading(seq0 + i) for i in range(batch)]
    return json.dumps(columnar_body([r["x"] for r in rs], [r["y"] for r in rs], [r["seq"] for r in rs])).encode()


def rows(batch: int, seq0: int) -> bytes:
    """The row form every server takes: ``{"samples": [{"x", "y", "seq"}, ...]}``."""
    return json.dumps({"source": "bench", "samples": [reading(seq0 + i) for i in range(batch)]}).encode()


class Seq:
    """Fresh source sequence numbers, so no posted sample is a duplicate."""

    def __init__(self) -> None:
        self.n = 0

    def take(self, k: int) -> int:
        self.n += k
        return self.n - k


# ---------------------------------------------------------------------------------------------
# outcome of each measure

def status(key: str, value: float | None) -> str:
    if value is None:
        return "skipped"
    _, _, bound, kind = TARGETS[key]
    return "met" if (value >= bound if kind == "min" else value <= bound) else "missed"


def med(values: list[float]) -> float:
    return statistics.median(values)


# ---------------------------------------------------------------------------------------------
# load from other processes (spawned: nothing of this process's state comes along)

def load_client(url: str, channel: str, stop: Any, counts: Any) -> None:
    """Post row-form batches of ``LOAD_BATCHES`` in turn to ``channel`` until ``stop`` is set;
    the samples sent go to ``counts`` (a queue) at the end."""
    bodies = [rows(b, 10**9 + k * 20_000) for k, b in enumerate(LOAD_BATCHES)]
    sent, seq = 0, 2 * 10**9
    t0 = time.monotonic()
    with httpx.Client(base_url=url, headers=AUTH, timeout=120) as c:
        k = 0
        while not stop.is_set():
            b = LOAD_BATCHES[k % len(LOAD_BATCHES)]
            body = bodies[k % len(bodies)] if k < len(bodies) else rows(b, seq)
            seq += b
            r = c.post(f"/v1/channels/{channel}/samples", content=body)
            if r.status_code != 200:
                counts.put(("error", f"{r.status_code} {r.text[:300]}"))
                return
            sent += b
            k += 1
    counts.put(("ok", sent, time.monotonic() - t0))


def pg_client(urls: list[str], channels: int, requests: int, seed: int, start: Any, out: Any) -> None:
    """``requests`` bodies of ``PG_BATCH`` samples to random channels, spread over ``urls`` in
    turn; after ``start`` (a barrier) puts (samples, first monotonic s, last monotonic s)."""
    rng = random.Random(seed)
    clients = [httpx.Client(base_url=u, headers=AUTH, timeout=60) for u in urls]
    seq0 = seed * 10**8
    bodies = [(f"/v1/channels/bench.pg{rng.randrange(channels)}/samples", rows(PG_BATCH, seq0 + r * PG_BATCH))
              for r in range(requests)]
    try:
        start.wait()
        t0 = time.monotonic()
        for r, (path, body) in enumerate(bodies):
            while True:
                resp = clients[r % len(clients)].post(path, content=body)
                if resp.status_code == 200:
                    break
                if resp.status_code != 503:
                    out.put(("error", f"{resp.status_code} {resp.text[:300]}"))
                    return
                time.sleep(0.01)
        out.put(("ok", requests * PG_BATCH, t0, time.monotonic()))
    finally:
        for c in clients:
            c.close()


# ---------------------------------------------------------------------------------------------
# the run

def run(size: str, out: Path) -> dict[str, Any]:
    plan = PLANS[size]
    tmp = Path(tempfile.mkdtemp(prefix="ck-ingest-bench-"))
    fleet = Fleet(tmp)
    try:
        return _run(plan, tmp, fleet, out)
    finally:
        fleet.stop()
        shutil.rmtree(tmp, ignore_errors=True)


def _serve(fleet: Fleet, name: str, db: str) -> Any:
    return fleet.spawn(name, ["curvekeeper.cli", "serve", "--db", db], "/readyz")


def _create(c: httpx.Client, cid: str) -> None:
    r = c.post("/v1/channels", json={"id": cid, **CHANNEL})
    if r.status_code not in (201, 409):
        raise RuntimeError(f"create {cid}: {r.status_code} {r.text[:300]}")


def _post(c: httpx.Client, path: str, body: bytes) -> httpx.Response:
    r = c.post(path, content=body)
    if r.status_code != 200:
        raise RuntimeError(f"{path}: {r.status_code} {r.text[:500]}")
    return r


def _run(plan: Plan, tmp: Path, fleet: Fleet, out: Path) -> dict[str, Any]:
    main = _serve(fleet, "main", f"sqlite:///{tmp / 'main.db'}")
    noop = fleet.spawn("noop", ["uvicorn", "tests.bench.noop_app:app", "--log-level", "warning"], "/docs")
    fleet.wait_ready()
    rounds = plan.rounds
    value: dict[str, float | None] = {}
    note: dict[str, str] = {}
    side = Table("Ingest, side by side (medians of rounds; requests to each target in turn)",
                 ["what", "figure", "against", "ratio", "unit", "against what"])
    noop_same = "the no-op route, same bodies"
    seq = Seq()
    c = httpx.Client(base_url=main.url, headers=AUTH, timeout=120)
    z = httpx.Client(base_url=noop.url, headers=JSON, timeout=120)
    lat_idle: list[float] = []
    lat_load: list[float] = []
    try:
        for cid in ("bench.col", "bench.big", "bench.one", "bench.load", "bench.predict"):
            _create(c, cid)
        _post(c, "/v1/channels/bench.predict/samples", rows(50, 0))
        for cl in (c, z):  # open the keep-alive connections
            cl.post("/v1/channels/bench.predict/predict", content=predict_body(1))

        # the columnar body: taken, or refused (a server without the form) and skipped
        probe = c.post("/v1/channels/bench.col/samples", content=columnar(3, seq.take(3)))
        columnar_ok = probe.status_code == 200
        if not columnar_ok:
            if probe.status_code != 422:
                raise RuntimeError(f"the columnar probe: {probe.status_code} {probe.text[:500]}")
            reason = str(probe.json().get("error", {}).get("message", ""))[:160]
            note["columnar_1000"] = f"skipped: the server answers 422 to the columnar body ({reason})"
            value["columnar_1000"] = None

        # 1. batch of 1,000, columnar (and the row form beside it, either way)
        forms = {"rows": rows, **({"columnar": columnar} if columnar_ok else {})}
        for form, make in forms.items():
            ours, base = [], []
            for _ in range(rounds):
                bodies = [make(1000, seq.take(1000)) for _ in range(plan.columnar)]
                zpath = "/noop/channels/bench.col/columns" if form == "columnar" else "/v1/channels/bench.col/samples"
                ms = alternate({"ours": (c, [("/v1/channels/bench.col/samples", b) for b in bodies]),
                                "no-op": (z, [(zpath, b) for b in bodies])})
                ours.append(rate(1000, ms["ours"]))
                base.append(rate(1000, ms["no-op"]))
            o, b = med(ours), med(base)
            side.add(f"batch of 1,000, {form} body", o, b, o / b, "samples/s", noop_same)
            if form == "columnar":
                value["columnar_1000"] = o / b
                note["columnar_1000"] = f"{o:,.0f} against {b:,.0f} samples/s"

        # 2. batch of 10,000, durable: columnar when the server takes it, the row form as well
        big_rates: dict[str, float] = {}
        for form, make in forms.items():
            ours, base = [], []
            for _ in range(rounds):
                bodies = [make(10_000, seq.take(10_000)) for _ in range(plan.big)]
                zpath = "/noop/channels/bench.big/columns" if form == "columnar" else "/v1/channels/bench.big/samples"
                ms = alternate({"ours": (c, [("/v1/channels/bench.big/samples", b) for b in bodies]),
                                "no-op": (z, [(zpath, b) for b in bodies])})
                ours.append(rate(10_000, ms["ours"]))
                base.append(rate(10_000, ms["no-op"]))
            o, b = med(ours), med(base)
            big_rates[form] = o
            side.add(f"batch of 10,000, {form} body", o, b, o / b, "samples/s", noop_same)
        best = "columnar" if columnar_ok else "rows"
        value["durable_10000"] = big_rates[best]
        note["durable_10000"] = (f"{best} body, synchronous=FULL" +
                                 ("" if columnar_ok else "; the server takes no columnar body yet"))

        # 3. single samples, the row form
        ours, base = [], []
        for _ in range(rounds):
            bodies = [rows(1, seq.take(1)) for _ in range(plan.single)]
            reqs = [("/v1/channels/bench.one/samples", b) for b in bodies]
            ms = alternate({"ours": (c, reqs), "no-op": (z, reqs)})
            ours.append(rate(1, ms["ours"]))
            base.append(rate(1, ms["no-op"]))
        o, b = med(ours), med(base)
        side.add("single-sample requests", o, b, o / b, "requests/s", noop_same)
        value["single"] = o / b
        note["single"] = f"{o:,.0f} against {b:,.0f} requests/s ({1e3 / o:.2f} / {1e3 / b:.2f} ms)"

        # 4. predict p99, idle and while another process ingests batches, in turns
        one = predict_body(1)
        ppath = "/v1/channels/bench.predict/predict"
        ctx = mp.get_context("spawn")
        loaded_samples = 0
        loader_s = 0.0
        for _ in range(rounds):
            for _k in range(plan.predicts):
                t0 = time.perf_counter()
                _post(c, ppath, one)
                lat_idle.append((time.perf_counter() - t0) * 1e3)
            stop, counts = ctx.Event(), ctx.Queue()
            loader = ctx.Process(target=load_client, args=(main.url, "bench.load", stop, counts))
            loader.start()
            try:
                _wait_for_load(c, main.url)
                for _k in range(plan.predicts):
                    t0 = time.perf_counter()
                    _post(c, ppath, one)
                    lat_load.append((time.perf_counter() - t0) * 1e3)
            finally:
                stop.set()
            kind, n, *took = counts.get(timeout=300)
            loader.join(timeout=60)
            if kind != "ok":
                raise RuntimeError(f"the loading client: {n}")
            loaded_samples += int(n)
            loader_s += took[0]
        i99, l99 = percentile(lat_idle, 99), percentile(lat_load, 99)
        value["predict_under_ingest"] = l99 / i99
        note["predict_under_ingest"] = (f"p99 {l99:.2f} ms loaded against {i99:.2f} ms idle "
                                        f"(p50 {percentile(lat_load, 50):.2f} / {percentile(lat_idle, 50):.2f} ms); "
                                        f"load: row batches of {' and '.join(f'{b:,}' for b in LOAD_BATCHES)}, "
                                        f"{loaded_samples / loader_s:,.0f} samples/s stored meanwhile")
        side.add("predict 1 value p99 under ingest", l99, i99, l99 / i99, "ms", "idle, same server")
        side.add("predict 1 value p50 under ingest", percentile(lat_load, 50), percentile(lat_idle, 50),
                 percentile(lat_load, 50) / percentile(lat_idle, 50), "ms", "idle, same server")
    finally:
        c.close()
        z.close()

    # 5. start to ready: the kernel cache is warm (the main server built it)
    starts = _starts(fleet, tmp, plan.starts)
    value["start_ready"] = med([s for _, s, _ in starts])
    cpus = [c for _, _, c in starts if c is not None]
    note["start_ready"] = (f"ready after {', '.join(f'{s:.2f}' for _, s, _ in starts)} s; listening after "
                           f"{med([a for a, _, _ in starts]):.2f} s (median); "
                           + (f"{med(cpus):.2f} CPU s to ready (median); " if cpus else "")
                           + f"imports alone {_import_s():.2f} s; load average {os.getloadavg()[0]:.1f} "
                           f"on {os.cpu_count()} cores")

    # 6. PostgreSQL: one process against two, same clients, in turns
    pg_rates, pg_note = _pg(fleet, plan)
    if pg_rates is None:
        value["pg_two_processes"] = None
        note["pg_two_processes"] = f"skipped: {pg_note}"
    else:
        one_r, two_r = pg_rates
        value["pg_two_processes"] = two_r / one_r
        note["pg_two_processes"] = f"{two_r:,.0f} against {one_r:,.0f} samples/s; {pg_note}"
        side.add("PostgreSQL, two service processes", two_r, one_r, two_r / one_r, "samples/s", "one process")

    targets = Table("Ingest targets (met / missed / skipped, from this run)",
                    ["measure", "target", "measured", "status", "figures"])
    headline: dict[str, Any] = {"columnar_body": columnar_ok, "load_average": [round(v, 2) for v in os.getloadavg()],
                                "start_cpu_s": med(cpus) if cpus else None}
    for key, (measure, said, _, _) in TARGETS.items():
        v = value.get(key)
        st = status(key, v)
        targets.add(measure, said, "" if v is None else round(v, 3), st, note.get(key, ""))
        headline[key] = {"value": v, "target": said, "status": st, "note": note.get(key, "")}
    targets.show()
    side.show()
    fig = _fig_latency(out, lat_idle, lat_load)
    return {"tables": [targets.to_json(), side.to_json()], "figures": [fig], "headline": headline}


def _wait_for_load(c: httpx.Client, url: str, timeout_s: float = 120.0) -> None:
    """Until the loading process's first samples are stored (its spawn takes a second)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        r = c.get("/v1/channels/bench.load")
        if r.status_code == 200 and (r.json().get("n_samples") or 0) > 0:
            return
        time.sleep(0.05)
    raise RuntimeError("the loading client stored nothing")


def cpu_seconds(pid: int) -> float | None:
    """User + system CPU seconds process ``pid`` has used (Linux ``/proc``), or None."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except (OSError, IndexError):
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _starts(fleet: Fleet, tmp: Path, n: int) -> list[tuple[float, float, float | None]]:
    """(listening, ready, CPU) seconds after the spawn of ``curvekeeper serve``, ``n`` starts
    on one store (made by the first start, before the timed ones); CPU: what the process
    used until ready (threads included), which the machine's other load does not stretch."""
    db = f"sqlite:///{tmp / 'start.db'}"
    out = []
    for k in range(n + 1):
        port = free_port()
        t0 = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-m", "curvekeeper.cli", "serve", "--db", db, "--port", str(port)],
                                env={**os.environ, "CURVEKEEPER_ADMIN_KEY": SECRET},
                                stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        listening = None
        try:
            while True:
                if proc.poll() is not None:
                    raise RuntimeError(f"serve exited: {proc.stderr.read()[-2000:] if proc.stderr else b''!r}")
                try:
                    r = httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1)
                    if listening is None:
                        listening = time.perf_counter() - t0
                    if r.status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                if time.perf_counter() - t0 > 120:
                    raise RuntimeError("serve did not become ready in 120 s")
                time.sleep(0.01)
            ready = time.perf_counter() - t0
            cpu = cpu_seconds(proc.pid)
        finally:
            proc.terminate()
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        if k:  # the first start makes the store
            out.append((listening or ready, ready, cpu))
    return out


def _import_s() -> float:
    """Seconds for a fresh interpreter to import the app and the command line."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import curvekeeper.api, curvekeeper.cli"], check=True)
    return time.perf_counter() - t0


def cpu_ticks() -> tuple[int, int] | None:
    """(busy, total) clock ticks of the whole machine so far (Linux ``/proc/stat``), or None."""
    try:
        fields = [int(v) for v in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:9]]
    except (OSError, ValueError):
        return None
    idle = fields[3] + fields[4]  # idle and iowait
    return sum(fields) - idle, sum(fields)


def busy_share(before: tuple[int, int] | None, after: tuple[int, int] | None) -> float | None:
    """The machine's CPU busy share between two ``cpu_ticks`` readings (0-1)."""
    if before is None or after is None or after[1] <= before[1]:
        return None
    return (after[0] - before[0]) / (after[1] - before[1])


def _pg(fleet: Fleet, plan: Plan) -> tuple[tuple[float, float] | None, str]:
    """(one process, two processes) samples/s on a fresh PostgreSQL database, or None and why."""
    try:
        from sqlalchemy import create_engine, text
    except ImportError as exc:
        return None, str(exc)
    name = f"ck_bench_ingest_{os.getpid()}"
    try:
        admin = create_engine(PG_ADMIN, isolation_level="AUTOCOMMIT", connect_args={"connect_timeout": 3})
        with admin.connect() as conn:
            conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
            conn.execute(text(f"CREATE DATABASE {name}"))
    except Exception as exc:  # no server, no driver, no rights: the measure says why
        where = PG_ADMIN.split("@", 1)[-1].rsplit("/", 1)[0]
        return None, f"PostgreSQL at {where} unreachable ({type(exc).__name__}: {str(exc).splitlines()[0]})"
    url = f"postgresql+psycopg://postgres@127.0.0.1:5432/{name}"
    servers = []
    try:
        servers.append(_serve(fleet, "pg1", url))
        fleet.wait_ready()  # the first start migrates the database; the others find it done
        servers += [_serve(fleet, "pg2", url), _serve(fleet, "pg3", url)]
        fleet.wait_ready()
        with httpx.Client(base_url=servers[0].url, headers=AUTH, timeout=60) as c:
            for i in range(plan.pg_channels):
                _create(c, f"bench.pg{i}")
        ctx = mp.get_context("spawn")
        results: dict[str, list[float]] = {"one": [], "two": []}
        busy: dict[str, list[float]] = {"one": [], "two": []}
        seed = 1
        for r in range(plan.pg_rounds):
            order = ["one", "two"] if r % 2 == 0 else ["two", "one"]
            for which in order:
                urls = [servers[0].url] if which == "one" else [servers[1].url, servers[2].url]
                start = ctx.Barrier(plan.pg_clients + 1)  # and this process: the CPU reading starts with them
                q = ctx.Queue()
                procs = []
                for _ in range(plan.pg_clients):
                    procs.append(ctx.Process(target=pg_client, args=(urls, plan.pg_channels, plan.pg_requests,
                                                                     seed, start, q)))
                    seed += 1
                for p in procs:
                    p.start()
                start.wait(timeout=300)
                ticks = cpu_ticks()
                got = [q.get(timeout=600) for _ in procs]
                share = busy_share(ticks, cpu_ticks())
                if share is not None:
                    busy[which].append(share)
                for p in procs:
                    p.join(timeout=60)
                bad = [g for g in got if g[0] != "ok"]
                if bad:
                    raise RuntimeError(f"a PostgreSQL client: {bad[0][1]}")
                total = sum(g[1] for g in got)
                results[which].append(total / (max(g[3] for g in got) - min(g[2] for g in got)))
        cpu = (f"; the machine's CPUs {med(busy['one']):.0%} busy with one process, {med(busy['two']):.0%} with two"
               if busy["one"] and busy["two"] else "")
        return ((med(results["one"]), med(results["two"])),
                f"{plan.pg_clients} client processes x {plan.pg_requests} requests of {PG_BATCH} samples to "
                f"{plan.pg_channels} channels, {plan.pg_rounds} round(s) each, on {os.cpu_count()} cores shared "
                f"with the clients and the database{cpu}")
    finally:
        for s in servers:
            if s.proc.poll() is None:
                s.proc.terminate()
        for s in servers:
            try:
                s.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                s.proc.kill()
        try:
            with admin.connect() as conn:
                conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
        finally:
            admin.dispose()


def _fig_latency(out: Path, idle: list[float], load: list[float]) -> str:
    fig, ax = figure("Predict (1 value) latency, idle and while another client ingests", "ms",
                     "fraction of requests at or under")
    for values, label in ((idle, "idle"), (load, "under ingest")):
        xs = sorted(values)
        ax.step(xs, [(i + 1) / len(xs) for i in range(len(xs))], where="post", label=f"{label} (n = {len(xs)})")
    ax.set_xscale("log")
    from matplotlib.ticker import FormatStrFormatter, NullFormatter

    ax.xaxis.set_major_formatter(FormatStrFormatter("%g"))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.axhline(0.99, color="grey", linestyle=":", label="p99")
    ax.legend()
    return save(fig, out, "ingest_predict_latency")


if __name__ == "__main__":
    section_main(run, __doc__)
