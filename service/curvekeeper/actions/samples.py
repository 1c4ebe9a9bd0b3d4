"""Ingest: learn from samples in order, store them, snapshot and record events."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Protocol

import numpy as np

from ..channel_config import min_snapshot_every
from ..core import InputError, LearnResult
from ..errors import ChannelArchived, ChannelNotFound, InvalidRequest, ReferenceRequired
from ..store import Repository
from ..store.repository import LearningState, SampleRows
from . import stale
from .channels import load
from .paging import Page, decode_cursor, encode_cursor
from .references import check_named
from .trace import record
from .unit import Unit, item_cost


class SampleLike(Protocol):
    """A sample as the routes parse it: x a number or a list (input order), y the reference,
    t the measurement time, seq the source's number."""

    @property
    def x(self) -> float | list[float]: ...
    @property
    def y(self) -> float: ...
    @property
    def t(self) -> datetime | None: ...
    @property
    def seq(self) -> int | None: ...
    # and optionally ``reference``, the reference instrument's id (None or absent: none)


@dataclass(frozen=True)
class SampleIn:
    """x: raw inputs in input order; y: reference; t: measurement time; seq: the source's
    number; reference: the reference instrument's id."""

    x: float | list[float]
    y: float
    t: datetime | None = None
    seq: int | None = None
    reference: str | None = None


@dataclass
class ChannelOutcome:
    accepted: int
    duplicates: int
    rejected: list[dict[str, Any]]  # index within the channel's part of the request, reason
    residuals: list[float | None]
    version: int
    n_samples: int
    drift: dict[str, Any]
    alarms: int = 0


def _wrong_inputs(i: int, d: int) -> InvalidRequest:
    return InvalidRequest(f"sample {i}: x needs {d} value(s), one per input, in the channel's input order",
                          details={"index": i, "field": "x"})


def _references(unit: Unit, samples: Sequence[SampleLike], keep: list[int], reference: str | None,
                required: bool) -> list[str | None] | None:
    """Per kept sample, the reference instrument it names (its own, else the request's);
    None when none does. Raises when a named one is unknown or retired, or when the channel
    requires one and a sample names none."""
    refs: list[str | None] = [getattr(samples[i], "reference", None) or reference for i in keep]
    if required:
        missing = next((keep[k] for k, r in enumerate(refs) if r is None), None)
        if missing is not None:
            raise ReferenceRequired(f"sample {missing}: this channel requires each sample to name its reference "
                                    "instrument (per sample, or reference for the whole request)",
                                    details={"index": missing, "field": "reference"})
    named = {r for r in refs if r is not None}
    if not named:
        return None
    check_named(unit.repo, named)
    return refs


def ingest_channel(unit: Unit, st: LearningState, samples: Sequence[SampleLike],
                   source: str | None, key_id: str | None, reference: str | None = None) -> ChannelOutcome:
    """Learn ``samples`` (in order) on a locked channel and write everything for it;
    ``reference`` is the reference instrument of the samples that name none."""
    repo = unit.repo
    now = unit.now()
    model = unit.write_model(st)
    unit.spend(len(samples) * item_cost(model))
    d = len(model.config["inputs"])
    seen: set[int] = set()
    if source is not None:
        seqs = [s.seq for s in samples if s.seq is not None]
        if seqs:
            seen = repo.seen_source_seqs(st.channel_pk, source, seqs)
    # one pass: drop retried samples, check and gather the inputs of the rest
    keep: list[int] = []
    xs: list[Any] = []
    ys: list[float] = []
    duplicates = 0
    for i, s in enumerate(samples):
        if source is not None and s.seq is not None:
            if s.seq in seen:
                duplicates += 1
                continue
            seen.add(s.seq)
        x = s.x
        if isinstance(x, list):
            if len(x) != d:
                raise _wrong_inputs(i, d)
            if d == 1:
                x = x[0]
        elif d != 1:
            raise _wrong_inputs(i, d)
        xs.append(x)
        ys.append(s.y)
        keep.append(i)
    refs = _references(unit, samples, keep, reference, bool(model.config.get("require_reference")))
    X = np.array(xs, dtype=np.float64).reshape(len(keep), d)
    y = np.array(ys, dtype=np.float64)
    n0, v0 = st.n_samples, st.version
    every = model.config["snapshot_every"]
    if every:  # a channel declared before the floor existed gets it now
        every = max(every, min_snapshot_every(model.config))
    cuts = [k for k in range(1, len(keep) + 1) if every and (n0 + k) % every == 0]
    bounds = sorted({0, *cuts, len(keep)})
    results: list[LearnResult] = []
    snaps: list[tuple[int, str, dict[str, Any]]] = []
    try:
        for a, b in zip(bounds, bounds[1:], strict=False):
            res = model.learn(X[a:b], y[a:b])
            if res.alarm_index is not None and res.before_alarm is not None:
                # the state just before the alarm: the last curve not yet pulled by the drift
                snaps.append((a + res.alarm_index, "drift-alarm", res.before_alarm))
            for e in res.events:
                e["index"] += a
            results.append(res)
            if b in cuts:
                snaps.append((b, "periodic", model.to_state()))
    except InputError as exc:
        idx = exc.details.get("index") if isinstance(exc.details, dict) else None
        where = keep[idx] if idx is not None and idx < len(keep) else None
        raise InvalidRequest(exc.message if where is None else f"sample {where}: {exc.message}",
                             details={"index": where, "field": exc.field}) from exc
    status = [s for r in results for s in r.status]
    resid = np.concatenate([r.residuals for r in results]) if results else np.empty(0)
    events = [e for r in results for e in r.events]
    alarms = sum(1 for e in events if e["kind"] == "drift_alarm")
    resid_list = [r if math.isfinite(r) else None for r in resid.tolist()]
    stats = np.concatenate([r.drift_statistic for r in results]).tolist() if results else []
    kept = [samples[i] for i in keep]
    times = [s.t or now for s in kept]
    repo.insert_samples(SampleRows(
        channel_pk=st.channel_pk, first_seq=n0 + 1, first_version=v0 + 1, source=source,
        source_seqs=[s.seq for s in kept] if source is not None else None, times=times, received_at=now,
        x=X, y=y.tolist(), residual=resid_list, drift_statistic=stats, status=status, references=refs))
    event_rows = []
    for k, kind, state in snaps:
        snap = repo.insert_snapshot(st.channel_pk, reason=kind, label=None, config=model.config, model_state=state,
                                    version=v0 + k, n_samples=n0 + k)
        if kind == "drift-alarm":
            event_rows.append({"channel_pk": st.channel_pk, "kind": "snapshot", "version": v0 + k, "key_id": key_id,
                               "details": {"snapshot": snap.pk, "reason": kind}})
    for e in events:
        k = e.pop("index")
        kind = e.pop("kind")
        # when it happened is the sample's measurement time (the event's own time is its receipt)
        event_rows.append({"channel_pk": st.channel_pk, "kind": kind, "version": v0 + k + 1, "key_id": key_id,
                           "details": {"sample_seq": n0 + k + 1, "measured_at": times[k].isoformat(), **e}})
    n_kept = len(keep)
    watch: dict[str, Any] = {}
    if n_kept:  # samples stored: the channel is not silent (duplicates alone store nothing)
        watch, stale_events = stale.on_samples(st, model.config, now, sample_seq=n0 + 1, measured_at=times[0],
                                               version=v0 + 1, key_id=key_id)
        event_rows[:0] = stale_events
    repo.insert_events(event_rows)
    rejected = [{"index": i, "reason": status[k]} for k, i in enumerate(keep) if status[k] != "accepted"]
    summary = model.summary()
    values: dict[str, Any] = {"n_samples": n0 + n_kept, "n_rejected": st.n_rejected + len(rejected), **watch}
    if times:
        latest = max(times)
        values["last_sample_at"] = latest if st.last_sample_at is None else max(latest, st.last_sample_at)
    unit.save_model(st, model, v0 + n_kept, **values)
    if times:
        record(repo, st.channel_pk, model, max(times), v0 + n_kept)
    per_request: list[float | None] = [None] * len(samples)
    for k, i in enumerate(keep):
        per_request[i] = resid_list[k]
    return ChannelOutcome(
        accepted=n_kept - len(rejected), duplicates=duplicates, rejected=rejected, residuals=per_request,
        version=v0 + n_kept, n_samples=n0 + n_kept, alarms=alarms,
        drift={"state": summary["drift"]["state"], "statistic": summary["drift"]["statistic"],
               "tolerance_state": summary["drift"]["tolerance_state"]},
    )


def _refuse_archived(channel_id: str, st: LearningState, suffix: str = "", details: dict[str, Any] | None = None
                     ) -> None:
    if st.archived_at is not None:
        raise ChannelArchived(f"channel {channel_id!r} is archived and takes no samples{suffix}; unarchive it "
                              "first", details={**(details or {}), "archived_at": st.archived_at.isoformat()})


def _learning(repo: Repository, channel_id: str) -> LearningState:
    st = repo.learning_state(channel_id)
    if st is None:
        raise ChannelNotFound(f"no channel {channel_id!r}")
    _refuse_archived(channel_id, st, "; nothing was stored")
    return st


def ingest(unit: Unit, channel_id: str, samples: Sequence[SampleLike], source: str | None,
           key_id: str | None, reference: str | None = None) -> ChannelOutcome:
    return ingest_channel(unit, _learning(unit.repo, channel_id), samples, source, key_id, reference)


NOTHING_STORED = "nothing in this batch was stored"


def ingest_gateway(unit: Unit, items: Sequence[tuple[str, SampleLike]], source: str | None,
                   key_id: str | None, reference: str | None = None) -> dict[str, Any]:
    """A gateway batch across channels: each channel's samples in request order, channels
    locked in id order, all in one transaction. All or nothing: an unknown channel or a bad
    sample refuses the whole batch (the error names the first such sample's index)."""
    repo = unit.repo
    groups: dict[str, list[int]] = {}
    for i, (cid, _) in enumerate(items):
        groups.setdefault(cid, []).append(i)
    found = {cid: repo.learning_state(cid) for cid in sorted(groups)}  # locked in id order
    unknown = [cid for cid, st in found.items() if st is None]
    if unknown:
        cid = min(unknown, key=lambda c: groups[c][0])
        raise ChannelNotFound(f"unknown channel {cid!r} (sample {groups[cid][0]}): {NOTHING_STORED}",
                              details={"index": groups[cid][0], "channel": cid})
    states = {cid: st for cid, st in found.items() if st is not None}
    archived = [cid for cid, st in states.items() if st.archived_at is not None]
    if archived:
        cid = min(archived, key=lambda c: groups[c][0])
        _refuse_archived(cid, states[cid], f" (sample {groups[cid][0]}): {NOTHING_STORED}",
                         {"index": groups[cid][0], "channel": cid})
    residuals: list[float | None] = [None] * len(items)
    rejected: list[dict[str, Any]] = []
    channels: dict[str, Any] = {}
    accepted = duplicates = alarms = 0
    for cid, st in states.items():
        idx = groups[cid]
        try:
            out = ingest_channel(unit, st, [items[i][1] for i in idx], source, key_id, reference)
        except InvalidRequest as exc:
            local = exc.details.get("index") if isinstance(exc.details, dict) else None
            where = idx[local] if local is not None else None
            # the same class: its code (e.g. reference_required) says what was wrong
            raise type(exc)(f"channel {cid}: {exc.message}; {NOTHING_STORED}",
                            details={"index": where, "channel": cid}) from exc
        accepted += out.accepted
        duplicates += out.duplicates
        alarms += out.alarms
        for k, r in enumerate(out.residuals):
            residuals[idx[k]] = r
        rejected.extend({"index": idx[r["index"]], "channel": cid, "reason": r["reason"]} for r in out.rejected)
        channels[cid] = {"version": out.version, "n_samples": out.n_samples, "drift": out.drift}
    rejected.sort(key=lambda r: r["index"])
    return {"accepted": accepted, "duplicates": duplicates, "rejected": rejected, "residuals": residuals,
            "channels": channels, "alarms": alarms}


def export(repo: Repository, channel_id: str, *, cursor: str | None, limit: int) -> Page:
    ch, _ = load(repo, channel_id)
    after = decode_cursor(cursor)
    rows = repo.list_samples(ch.pk, after_seq=after, limit=limit + 1)
    items = [{"seq": r.seq, "t": r.t, "received_at": r.received_at, "source": r.source,
              "source_seq": r.source_seq, "x": r.x, "y": r.y, "residual": r.residual,
              "drift_statistic": r.drift_statistic, "accepted": r.accepted, "reason": r.reason,
              "reference": r.reference} for r in rows[:limit]]
    return Page(items, encode_cursor(rows[limit - 1].seq) if len(rows) > limit else None)
