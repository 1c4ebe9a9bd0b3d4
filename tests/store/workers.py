"""Client processes for the crash tests (started with multiprocessing's spawn: this module
imports only the client, so a worker starts fast).

A streamer sends samples keyed by its name (``source``) and an increasing ``seq``, to its own
channel, to a shared one, and as gateway batches across both, through ``curvekeeper.client``
with retries. It writes one JSON line per batch to its file before sending it
(``{"sent": [...]}``) and one when the server acknowledged it (``{"acked": [...]}``), so the
test knows what may be stored and what must be.
"""

from __future__ import annotations

import json
import random
from dataclasses import dataclass, field
from multiprocessing.sharedctypes import Synchronized
from multiprocessing.synchronize import Event
from pathlib import Path
from typing import Any

from curvekeeper.client import Client, ClientError


def retrying_client(url: str, key: str, seed: int) -> Client:
    """A client that rides out a restart: the server is down for a couple of seconds per
    kill (longer on a loaded machine), so it retries for about 20 s (its caller then starts
    over with the same batch until the test stops it); answers may take 15 s on a busy store."""
    return Client(url, key, timeout=15.0, max_retries=60, backoff=0.05, max_backoff=0.4, seed=seed)


def stream(url: str, key: str, name: str, own: str, shared: str, out: str, stop: Event,
           progress: Synchronized[int], seed: int) -> None:
    rng = random.Random(seed)
    seq = 0
    with retrying_client(url, key, seed) as client, Path(out).open("a") as log:
        while not stop.is_set():
            n = rng.randint(1, 6)
            pick = rng.random()
            targets = [own] * n if pick < 0.4 else [shared] * n if pick < 0.8 else \
                [rng.choice((own, shared)) for _ in range(n)]
            batch: list[dict[str, Any]] = []
            for ch in targets:
                seq += 1
                x = rng.uniform(0.0, 100.0)
                batch.append({"channel": ch, "x": x, "y": 2.0 * x + 1.0 + rng.gauss(0.0, 0.5), "seq": seq})
            triples = [[s["channel"], name, s["seq"]] for s in batch]
            log.write(json.dumps({"sent": triples}) + "\n")
            log.flush()
            while True:  # the same batch until it is acknowledged (idempotent: source + seq)
                try:
                    if pick < 0.8:
                        answer = client.post_samples(targets[0], [{k: v for k, v in s.items() if k != "channel"}
                                                                  for s in batch], source=name)
                    else:
                        answer = client.post_gateway(batch, source=name)
                except ClientError as exc:
                    if exc.status is not None:
                        log.write(json.dumps({"error": [exc.status, exc.code, exc.message]}) + "\n")
                        log.flush()
                        break
                    if stop.is_set():
                        return
                    continue
                # duplicates: stored by an attempt whose answer the kill cut off
                log.write(json.dumps({"acked": triples, "duplicates": answer["duplicates"]}) + "\n")
                log.flush()
                with progress.get_lock():
                    progress.value += n
                break


@dataclass
class StreamLog:
    acked: set[tuple[str, str, int]] = field(default_factory=set)
    sent: set[tuple[str, str, int]] = field(default_factory=set)
    duplicates: int = 0  # samples answered as duplicates (their first attempt's answer was lost)
    errors: list[Any] = field(default_factory=list)


def read_log(path: Path) -> StreamLog:
    """What a streamer's file says."""
    out = StreamLog()
    for line in path.read_text().splitlines():
        rec = json.loads(line)
        out.acked.update((c, s, int(q)) for c, s, q in rec.get("acked", []))
        out.sent.update((c, s, int(q)) for c, s, q in rec.get("sent", []))
        out.duplicates += rec.get("duplicates", 0)
        if "error" in rec:
            out.errors.append(rec["error"])
    return out
