"""A fleet of devices and a gateway posting a scenario's samples to a running service.

Probes named in ``gateway`` reach the service through one gateway, which batches every
probe's readings of ``gateway_steps`` time steps into one ``POST /v1/samples``; the other
probes are devices posting their own readings in batches of ``device_batch`` to
``POST /v1/channels/{id}/samples``. Each source numbers its samples (``seq``), so the
client's retries (connection errors, 503, 429; see ``curvekeeper.client``) are idempotent.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from ..client import Client
from .scenario import Stream


@dataclass
class FleetReport:
    accepted: int = 0
    rejected: int = 0
    duplicates: int = 0
    requests: int = 0
    per_channel: dict[str, int] = field(default_factory=dict)


def _when(t0: datetime, day: float) -> str:
    return (t0 + timedelta(days=day)).isoformat()


def simulate(client: Client, stream: Stream, *, t0: datetime, gateway: Iterable[str], gateway_steps: int = 12,
             device_batch: int = 6, rate: float = 0.0, progress: Callable[[int], None] | None = None) -> FleetReport:
    """Post every sample of ``stream`` in time order; ``rate`` caps samples per second (0: no cap)."""
    via_gateway = set(gateway)
    report = FleetReport()
    seqs: dict[str, int] = {}
    pending_gw: list[dict[str, Any]] = []
    pending_dev: dict[str, list[dict[str, Any]]] = {}
    steps_in_gw: set[float] = set()
    started = time.monotonic()
    sent = 0

    def account(out: dict[str, Any], n: int) -> None:
        nonlocal sent
        report.requests += 1
        report.accepted += out["accepted"]
        report.rejected += len(out["rejected"])
        report.duplicates += out["duplicates"]
        sent += n
        if progress:
            progress(n)
        if rate > 0:
            ahead = sent / rate - (time.monotonic() - started)
            if ahead > 0:
                time.sleep(ahead)

    def next_seq(source: str) -> int:
        seqs[source] = seqs.get(source, 0) + 1
        return seqs[source]

    for cid, day, raw, ref in zip(stream.channel, stream.day.tolist(), stream.raw.tolist(),
                                  stream.reference.tolist(), strict=True):
        report.per_channel[cid] = report.per_channel.get(cid, 0) + 1
        sample = {"x": raw, "y": ref, "t": _when(t0, day)}
        if cid in via_gateway:
            if day not in steps_in_gw and len(steps_in_gw) == gateway_steps:
                account(client.post_gateway(pending_gw, source="gw-1"), len(pending_gw))
                pending_gw, steps_in_gw = [], set()
            steps_in_gw.add(day)
            pending_gw.append({**sample, "channel": cid, "seq": next_seq("gw-1")})
        else:
            batch = pending_dev.setdefault(cid, [])
            batch.append({**sample, "seq": next_seq(cid)})
            if len(batch) == device_batch:
                account(client.post_samples(cid, batch, source=cid), len(batch))
                pending_dev[cid] = []
    if pending_gw:
        account(client.post_gateway(pending_gw, source="gw-1"), len(pending_gw))
    for cid, batch in pending_dev.items():
        if batch:
            account(client.post_samples(cid, batch, source=cid), len(batch))
    return report
