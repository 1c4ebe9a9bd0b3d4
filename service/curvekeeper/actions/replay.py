"""Replay: rebuild a channel's state from a snapshot (or its creation) and the stored log.

The log is the append-only samples plus the events that change a state without a
sample: ``calibration`` (its points, and the history window it used), ``settings_changed``
(the resulting config), ``rollback`` (the restored snapshot, and whether its curve became
the reference), ``acknowledged`` (a drift alarm cleared) and ``service_changed``. Each change has the
channel version it produced, so the log is replayed in version order. ``archived`` and
``unarchived`` change no learned state: the newest of them says whether the channel is
archived, which a check compares with the channel row. Learning is
deterministic and does not depend on how samples were split into requests, so a
replay reproduces the stored state to the last bit.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np

from ..core import ChannelModel
from ..core.config import adopt_settings
from ..errors import InvalidRequest, SnapshotNotFound
from ..store import Repository
from ..store.tables import Sample
from .channels import load
from .snapshots import roll_back
from .unit import restore

STATE_EVENTS = ("channel_created", "calibration", "settings_changed", "rollback", "acknowledged", "service_changed")
#: events that archive and unarchive a channel: no learned state, the channel row's ``archived_at``
ARCHIVE_EVENTS = ("archived", "unarchived")
BATCH = 5000


@dataclass
class ReplayReport:
    channel: str
    start_version: int
    version: int
    n_samples: int
    replayed_samples: int
    replayed_events: int
    matches: bool | None = None
    mismatches: list[str] = field(default_factory=list)
    state: dict[str, Any] = field(default_factory=dict)
    archived: bool = False  # what the log says: its newest archived / unarchived event


def _history(repo: Repository, channel_pk: int, hist: dict[str, Any]) -> tuple[list[list[float]], list[float]]:
    since = datetime.fromisoformat(hist["since"]) if hist.get("since") else None
    until = datetime.fromisoformat(hist["until"]) if hist.get("until") else None
    rows = repo.history(channel_pk, since=since, until=until, last=hist.get("last"),
                        max_seq=hist["max_seq"], limit=10**9)
    return [r.x for r in rows], [r.y for r in rows]


def _learn_run(model: ChannelModel, run: list[Sample], check: list[str]) -> None:
    X = np.array([s.x for s in run], dtype=np.float64)
    y = np.array([s.y for s in run], dtype=np.float64)
    result = model.learn(X, y)
    for s, status in zip(run, result.status, strict=True):
        if (status == "accepted") != s.accepted and len(check) < 20:
            check.append(f"sample {s.seq}: stored {'accepted' if s.accepted else s.reason}, replay {status}")


def replay(repo: Repository, channel_id: str, *, from_snapshot: int | None = None, check: bool = False,
           progress: Callable[[int], None] | None = None) -> ReplayReport:
    """Rebuild the channel's model from the log; with ``check``, compare it with the stored state."""
    ch, st = load(repo, channel_id)
    if from_snapshot is not None:
        snap = repo.get_snapshot(ch.pk, from_snapshot)
        if snap is None:
            raise SnapshotNotFound(f"channel {channel_id!r} has no snapshot {from_snapshot}")
        if snap.reason == "drift-alarm":
            raise InvalidRequest(f"snapshot {from_snapshot} was taken at a drift alarm and holds the curve from "
                                 "before the estimated change point, not the state at its version: replay from "
                                 "another snapshot (or from the start)", details={"field": "from_snapshot"})
        model = restore(snap.config, snap.model_state, f"snapshot {snap.pk}")
        version, seq = snap.version, snap.n_samples
    else:
        created = repo.first_event(ch.pk, "channel_created")
        if created is None:
            raise InvalidRequest(f"channel {channel_id!r} has no creation event to replay from")
        model = ChannelModel.from_config(created.details["config"])
        version = seq = 0
    start = version
    events = iter(repo.state_events(ch.pk, after_version=version, kinds=STATE_EVENTS[1:]))
    next_event = next(events, None)
    status_mismatches: list[str] = []
    n_samples = n_events = 0
    run: list[Sample] = []

    def flush() -> None:
        nonlocal n_samples
        if run:
            _learn_run(model, run, status_mismatches)
            n_samples += len(run)
            if progress:
                progress(len(run))
            run.clear()

    for sample in _samples_after(repo, ch.pk, seq):
        while next_event is not None and next_event.version is not None and next_event.version < sample.version:
            flush()
            model = _apply(repo, ch.pk, model, next_event.kind, next_event.details)
            n_events += 1
            next_event = next(events, None)
        run.append(sample)
        if len(run) >= BATCH:
            flush()
    flush()
    while next_event is not None:
        model = _apply(repo, ch.pk, model, next_event.kind, next_event.details)
        n_events += 1
        next_event = next(events, None)
    last = repo.last_event(ch.pk, ARCHIVE_EVENTS)
    report = ReplayReport(channel_id, start, st.version, st.n_samples, n_samples, n_events, state=model.to_state(),
                          archived=last is not None and last.kind == "archived")
    if check:
        stored = repo.model_state(ch.pk)
        report.mismatches = status_mismatches + _differences(stored, report.state)
        if model.config != ch.config:
            report.mismatches.append("config differs: the stored channel config is not the one the log gives")
        if report.archived != (ch.archived_at is not None):
            report.mismatches.append(f"archived differs: stored {ch.archived_at is not None}, the log says "
                                     f"{report.archived}")
        report.matches = not report.mismatches
    return report


def _samples_after(repo: Repository, channel_pk: int, seq: int) -> Iterator[Sample]:
    """The samples stored after the ``seq``-th, in order, a page at a time."""
    after = seq
    while True:
        rows = repo.samples_after_seq(channel_pk, after_seq=after, limit=BATCH)
        if not rows:
            return
        yield from rows
        after = rows[-1].seq


def _apply(repo: Repository, channel_pk: int, model: ChannelModel, kind: str, details: dict[str, Any]
           ) -> ChannelModel:
    if kind == "calibration":
        xs = [p[0] for p in details["points"]]
        ys = [p[1] for p in details["points"]]
        if details.get("history"):
            hx, hy = _history(repo, channel_pk, details["history"])
            xs += hx
            ys += hy
        d = len(model.config["inputs"])
        model.fit_closed_form(np.array(xs, dtype=np.float64).reshape(len(xs), d), np.array(ys))
        if details.get("reference_setting"):  # the reference instrument named gave the channel its U and k
            return model.with_settings({**model.config, "reference": details["reference_setting"]})
        return model
    if kind == "settings_changed":
        cfg = details["config"]
        return model.with_settings(adopt_settings(model.config, cfg))
    if kind == "rollback":
        snap = repo.get_snapshot(channel_pk, details["snapshot"])
        if snap is None:
            raise SnapshotNotFound(f"the log names snapshot {details['snapshot']}, which is missing")
        restored = restore(snap.config, snap.model_state, f"snapshot {snap.pk}")
        # a rollback logged before the choice existed made the restored curve the reference
        return roll_back(model, restored, set_reference=details.get("set_reference", True))
    if kind == "acknowledged":
        model.acknowledge()
        return model
    if kind == "service_changed":
        model.set_service(details["to"])
        return model
    return model


def _differences(stored: dict[str, Any], replayed: dict[str, Any]) -> list[str]:
    out = []
    for key in sorted(set(stored) | set(replayed)):
        if stored.get(key) != replayed.get(key):
            if key == "weights":
                a, b = np.array(stored[key]), np.array(replayed[key])
                out.append(f"weights differ: largest difference {np.max(np.abs(a - b)):.3e}")
            else:
                was, now = str(stored.get(key))[:120], str(replayed.get(key))[:120]
                out.append(f"{key} differs: stored {was}, replayed {now}")
    return out
