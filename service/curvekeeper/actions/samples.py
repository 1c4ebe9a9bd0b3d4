"""Ingest: learn from samples in order, store them, snapshot and record events."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

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


@dataclass(frozen=True)
class SampleBatch:
    """Samples column by column, in request order (n samples): the columnar body as the
    route reads it, and the row body converted once (``SampleBatch.of_rows``).

    x : (n, k) raw inputs in input order (k values a sample; the channel needs k = its inputs)
    y : (n,) references in output units
    t : per sample, the measurement time (None: the receive time); None: no sample has one
    seq : (n,) the source's numbers (int64); None: no sample has one
    has_seq : (n,) bool, which samples have a seq; None: all (when ``seq`` is given)
    references : per sample, the reference instrument it names itself; None: none does
    """

    x: NDArray[np.float64]
    y: NDArray[np.float64]
    t: list[datetime | None] | None = None
    seq: NDArray[np.int64] | None = None
    has_seq: NDArray[np.bool_] | None = None
    references: list[str | None] | None = None

    def __len__(self) -> int:
        return int(self.y.shape[0])

    def take(self, keep: NDArray[np.intp]) -> SampleBatch:
        """The samples at request indexes ``keep``, in that order."""
        if keep.size == len(self):
            return self
        idx = keep.tolist()
        return SampleBatch(x=self.x[keep], y=self.y[keep], t=None if self.t is None else [self.t[i] for i in idx],
                           seq=None if self.seq is None else self.seq[keep],
                           has_seq=None if self.has_seq is None else self.has_seq[keep],
                           references=None if self.references is None else [self.references[i] for i in idx])

    @classmethod
    def of_rows(cls, samples: Sequence[SampleLike], d: int, index: Sequence[int] | None = None) -> SampleBatch:
        """The rows as columns for a channel of ``d`` inputs; raises ``InvalidRequest`` (x,
        the first sample whose x does not give ``d`` values; ``index``: each row's index in
        the request) as the row body always has."""
        n = len(samples)
        xs = [s.x for s in samples]
        if d == 1 and set(map(type, xs)) <= {float, int}:  # the common case: one number a sample
            X = np.array(xs, dtype=np.float64).reshape(n, 1)
        else:
            flat: list[float] = []
            for i, x in enumerate(xs):
                if isinstance(x, list):
                    if len(x) != d:
                        raise _wrong_inputs(i if index is None else index[i], d)
                    flat.extend(x)
                elif d != 1:
                    raise _wrong_inputs(i if index is None else index[i], d)
                else:
                    flat.append(x)
            X = np.array(flat, dtype=np.float64).reshape(n, d)
        ts = [s.t for s in samples]
        refs = [getattr(s, "reference", None) for s in samples]
        seq, has = _seq_columns(samples)
        return cls(x=X, y=np.array([s.y for s in samples], dtype=np.float64),
                   t=ts if any(t is not None for t in ts) else None, seq=seq, has_seq=has,
                   references=refs if any(r is not None for r in refs) else None)


def _seq_columns(samples: Sequence[SampleLike]) -> tuple[NDArray[np.int64] | None, NDArray[np.bool_] | None]:
    """(seq, has_seq) of rows as ``SampleBatch`` holds them."""
    seqs = [s.seq for s in samples]
    has = np.fromiter((q is not None for q in seqs), dtype=np.bool_, count=len(seqs))
    if not has.any():
        return None, None
    return np.array([0 if q is None else q for q in seqs], dtype=np.int64), None if has.all() else has


@dataclass
class ChannelOutcome:
    """What one channel learned from a request's samples. ``kept``: (m,) request indexes of
    the samples stored (duplicates are not); ``kept_residuals``: (m,) their prior residuals,
    output units (NaN where not finite); ``n``: samples in the request."""

    accepted: int
    duplicates: int
    rejected: list[dict[str, Any]]  # index within the channel's part of the request, reason
    version: int
    n_samples: int
    drift: dict[str, Any]
    quality: dict[str, Any]
    n: int
    kept: NDArray[np.intp]
    kept_residuals: NDArray[np.float64]
    alarms: int = 0

    @property
    def residuals(self) -> list[float | None]:
        """Per sample in request order: the prior residual, None for a duplicate or a residual
        that is not finite."""
        per = np.full(self.n, np.nan)
        per[self.kept] = self.kept_residuals
        return [None if r != r else r for r in per.tolist()]

    def residual_summary(self) -> dict[str, Any]:
        """count, mean, s.d. (n - 1; None below 2) and largest |r| of the finite residuals of
        the stored samples, output units (None when there is none)."""
        return summarise_residuals(self.kept_residuals)

    def rejected_counts(self) -> dict[str, int]:
        """Samples stored but not learned, by reason."""
        out: dict[str, int] = {}
        for r in self.rejected:
            out[r["reason"]] = out.get(r["reason"], 0) + 1
        return out


def summarise_residuals(residuals: NDArray[np.float64]) -> dict[str, Any]:
    """count, mean, s.d. (n - 1; None below 2) and largest |r| of the finite values of
    ``residuals`` (output units; None when there is none)."""
    r = residuals[np.isfinite(residuals)]
    if r.size == 0:
        return {"count": 0, "mean": None, "sd": None, "max_abs": None}
    return {"count": int(r.size), "mean": float(np.mean(r)),
            "sd": float(np.std(r, ddof=1)) if r.size > 1 else None, "max_abs": float(np.max(np.abs(r)))}


def _wrong_inputs(i: int, d: int) -> InvalidRequest:
    return InvalidRequest(f"sample {i}: x needs {d} value(s), one per input, in the channel's input order",
                          details={"index": i, "field": "x"})


def _references(unit: Unit, batch: SampleBatch, keep: NDArray[np.intp], reference: str | None,
                required: bool) -> list[str | None] | None:
    """Per sample of ``batch`` (the kept samples, at request indexes ``keep``), the reference
    instrument it names (its own, else the request's);
    None when none does. Raises when a named one is unknown or retired, or when the channel
    requires one and a sample names none."""
    own = batch.references
    if own is None:
        if reference is None:
            if required and len(keep):
                raise _reference_required(int(keep[0]))
            return None
        refs: list[str | None] = [reference] * len(keep)
    else:
        refs = [r or reference for r in own]
    if required:
        missing = next((int(keep[k]) for k, r in enumerate(refs) if r is None), None)
        if missing is not None:
            raise _reference_required(missing)
    named = {r for r in refs if r is not None}
    if not named:
        return None
    check_named(unit.repo, named)
    return refs


def _reference_required(i: int) -> ReferenceRequired:
    return ReferenceRequired(f"sample {i}: this channel requires each sample to name its reference "
                             "instrument (per sample, or reference for the whole request)",
                             details={"index": i, "field": "reference"})


def _kept(repo: Repository, channel_pk: int, n: int, seq: NDArray[np.int64] | None,
          has: NDArray[np.bool_] | None, source: str | None) -> NDArray[np.intp]:
    """Request indexes of the samples to store, of ``n``: all but retries, i.e. a (source,
    seq) this channel has stored already or that an earlier sample of the batch has
    (vectorised; ``seq`` and ``has`` as ``SampleBatch`` holds them)."""
    if source is None or seq is None:
        return np.arange(n)
    given = seq if has is None else seq[has]
    if given.size == 0:
        return np.arange(n)
    seen = repo.seen_source_seqs(channel_pk, source, given)
    where = np.arange(n) if has is None else np.flatnonzero(has)
    _, first = np.unique(given, return_index=True)  # the first sample of each seq in the batch
    fresh = np.zeros(given.size, dtype=np.bool_)
    fresh[first] = True
    if seen:
        fresh &= ~np.isin(given, np.fromiter(seen, dtype=np.int64, count=len(seen)))
    if has is None:
        return np.flatnonzero(fresh)
    keep = np.ones(n, dtype=np.bool_)
    keep[where] = fresh
    return np.flatnonzero(keep)


def ingest_channel(unit: Unit, st: LearningState, samples: Sequence[SampleLike] | SampleBatch,
                   source: str | None, key_id: str | None, reference: str | None = None) -> ChannelOutcome:
    """Learn ``samples`` (rows, or a ``SampleBatch``; in order) on a locked channel and write
    everything for it; ``reference`` is the reference instrument of the samples that name none."""
    repo = unit.repo
    now = unit.now()
    n = len(samples)
    shared = unit.read_model(st)
    unit.spend(n * item_cost(shared))  # over the event loop's budget: raises before the model is copied
    model = shared.copy()  # as unit.write_model gives it
    d = len(model.config["inputs"])
    if isinstance(samples, SampleBatch):
        if samples.x.shape[1] != d:
            raise _wrong_inputs(0, d)
        keep = _kept(repo, st.channel_pk, n, samples.seq, samples.has_seq, source)
        batch = samples.take(keep)
    else:  # rows: retries are dropped before their x is looked at, as always
        keep = _kept(repo, st.channel_pk, n, *_seq_columns(samples), source)
        idx = keep.tolist()
        batch = SampleBatch.of_rows(samples if len(idx) == n else [samples[i] for i in idx], d, idx)
    n_kept = int(keep.size)
    duplicates = n - n_kept
    refs = _references(unit, batch, keep, reference, bool(model.config.get("require_reference")))
    X, y = batch.x, batch.y
    n0, v0 = st.n_samples, st.version
    every = model.config["snapshot_every"]
    if every:  # a channel declared before the floor existed gets it now
        every = max(every, min_snapshot_every(model.config))
    cuts = [k for k in range(1, n_kept + 1) if every and (n0 + k) % every == 0]
    bounds = sorted({0, *cuts, n_kept})
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
        where = int(keep[idx]) if idx is not None and idx < n_kept else None
        raise InvalidRequest(exc.message if where is None else f"sample {where}: {exc.message}",
                             details={"index": where, "field": exc.field}) from exc
    if len(results) == 1:
        status, resid, stats_a = results[0].status, results[0].residuals, results[0].drift_statistic
    else:
        status = [s for r in results for s in r.status]
        resid = np.concatenate([r.residuals for r in results]) if results else np.empty(0)
        stats_a = np.concatenate([r.drift_statistic for r in results]) if results else np.empty(0)
    resid = np.where(np.isfinite(resid), resid, np.nan)
    events = [e for r in results for e in r.events]
    alarms = sum(1 for e in events if e["kind"] == "drift_alarm")
    resid_list = [None if r != r else r for r in resid.tolist()]
    if batch.t is None:
        times: list[datetime] = [now] * n_kept
        latest: datetime | None = now if n_kept else None
    else:
        times = [t or now for t in batch.t]
        latest = max(times) if times else None
    seqs: list[int | None] | None = None
    if source is not None and batch.seq is not None:
        seqs = batch.seq.tolist()
        if batch.has_seq is not None:
            seqs = [q if h else None for q, h in zip(seqs, batch.has_seq.tolist(), strict=True)]
    repo.insert_samples(SampleRows(
        channel_pk=st.channel_pk, first_seq=n0 + 1, first_version=v0 + 1, source=source,
        source_seqs=seqs, times=times, received_at=now,
        x=X, y=y.tolist(), residual=resid_list, drift_statistic=stats_a.tolist(), status=status, references=refs))
    event_rows = []
    if all(kind == "periodic" for _, kind, _ in snaps):  # the common case: in one statement
        repo.insert_snapshots(st.channel_pk, reason="periodic", config=model.config,
                              snaps=[(v0 + k, n0 + k, state) for k, _, state in snaps])
        snaps = []
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
    watch: dict[str, Any] = {}
    if n_kept:  # samples stored: the channel is not silent (duplicates alone store nothing)
        watch, stale_events = stale.on_samples(st, model.config, now, sample_seq=n0 + 1, measured_at=times[0],
                                               version=v0 + 1, key_id=key_id)
        event_rows[:0] = stale_events
    repo.insert_events(event_rows)
    keep_list = keep.tolist()
    rejected = [{"index": keep_list[k], "reason": s} for k, s in enumerate(status) if s != "accepted"]
    values: dict[str, Any] = {"n_samples": n0 + n_kept, "n_rejected": st.n_rejected + len(rejected), **watch}
    if latest is not None:
        values["last_sample_at"] = latest if st.last_sample_at is None else max(latest, st.last_sample_at)
    unit.save_model(st, model, v0 + n_kept, **values)
    if latest is not None:
        record(repo, st.channel_pk, model, latest, v0 + n_kept)
    summary = model.summary()
    # after samples the channel is not silent; before any (duplicates only) it is as it was
    silent = not n_kept and stale.is_stale(st.stale_after, now)
    return ChannelOutcome(
        accepted=n_kept - len(rejected), duplicates=duplicates, rejected=rejected,
        version=v0 + n_kept, n_samples=n0 + n_kept, alarms=alarms, n=n, kept=keep, kept_residuals=resid,
        drift={"state": summary["drift"]["state"], "statistic": summary["drift"]["statistic"],
               "tolerance_state": summary["drift"]["tolerance_state"]},
        quality={**model.quality(), "stale": silent},
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


def ingest(unit: Unit, channel_id: str, samples: Sequence[SampleLike] | SampleBatch, source: str | None,
           key_id: str | None, reference: str | None = None) -> ChannelOutcome:
    return ingest_channel(unit, _learning(unit.repo, channel_id), samples, source, key_id, reference)


NOTHING_STORED = "nothing in this batch was stored"


@dataclass(frozen=True)
class GatewayBatch:
    """A columnar gateway batch split by channel: ``n`` samples in the request; ``parts``,
    per channel (in order of first appearance), the (m,) request indexes of its samples in
    request order and those samples as a ``SampleBatch``."""

    n: int
    parts: dict[str, tuple[NDArray[np.intp], SampleBatch]]


def ingest_gateway(unit: Unit, items: Sequence[tuple[str, SampleLike]] | GatewayBatch, source: str | None,
                   key_id: str | None, reference: str | None = None) -> dict[str, Any]:
    """A gateway batch across channels (rows: (channel, sample) pairs; or columns split by
    channel): each channel's samples in request order, channels locked in id order, all in
    one transaction. All or nothing: an unknown channel or a bad sample refuses the whole
    batch (the error names the first such sample's index in the request, and its channel)."""
    repo = unit.repo
    parts: dict[str, tuple[NDArray[np.intp], Sequence[SampleLike] | SampleBatch]]
    if isinstance(items, GatewayBatch):
        n, parts = items.n, dict(items.parts)
    else:
        n = len(items)
        groups: dict[str, list[int]] = {}
        for i, (cid, _) in enumerate(items):
            groups.setdefault(cid, []).append(i)
        parts = {cid: (np.array(idx, dtype=np.intp), [items[i][1] for i in idx]) for cid, idx in groups.items()}
    first = {cid: int(idx[0]) for cid, (idx, _) in parts.items()}
    found = {cid: repo.learning_state(cid) for cid in sorted(parts)}  # locked in id order
    unknown = [cid for cid, st in found.items() if st is None]
    if unknown:
        cid = min(unknown, key=first.__getitem__)
        raise ChannelNotFound(f"unknown channel {cid!r} (sample {first[cid]}): {NOTHING_STORED}",
                              details={"index": first[cid], "channel": cid})
    states = {cid: st for cid, st in found.items() if st is not None}
    archived = [cid for cid, st in states.items() if st.archived_at is not None]
    if archived:
        cid = min(archived, key=first.__getitem__)
        _refuse_archived(cid, states[cid], f" (sample {first[cid]}): {NOTHING_STORED}",
                         {"index": first[cid], "channel": cid})
    per = np.full(n, np.nan)  # prior residuals in request order (NaN: a duplicate, or not finite)
    rejected: list[dict[str, Any]] = []
    channels: dict[str, Any] = {}
    accepted = duplicates = alarms = 0
    for cid, st in states.items():
        idx, part = parts[cid]
        try:
            out = ingest_channel(unit, st, part, source, key_id, reference)
        except InvalidRequest as exc:
            local = exc.details.get("index") if isinstance(exc.details, dict) else None
            where = int(idx[local]) if local is not None else None
            # the same class: its code (e.g. reference_required) says what was wrong
            raise type(exc)(f"channel {cid}: {exc.message}; {NOTHING_STORED}",
                            details={"index": where, "channel": cid}) from exc
        accepted += out.accepted
        duplicates += out.duplicates
        alarms += out.alarms
        per[idx[out.kept]] = out.kept_residuals
        rejected.extend({"index": int(idx[r["index"]]), "channel": cid, "reason": r["reason"]} for r in out.rejected)
        channels[cid] = {"version": out.version, "n_samples": out.n_samples, "drift": out.drift}
    rejected.sort(key=lambda r: r["index"])
    return {"accepted": accepted, "duplicates": duplicates, "rejected": rejected,
            "residuals": [None if r != r else r for r in per.tolist()], "channels": channels, "alarms": alarms}


def export(repo: Repository, channel_id: str, *, cursor: str | None, limit: int) -> Page:
    ch, _ = load(repo, channel_id)
    after = decode_cursor(cursor)
    rows = repo.list_samples(ch.pk, after_seq=after, limit=limit + 1)
    items = [{"seq": r.seq, "t": r.t, "received_at": r.received_at, "source": r.source,
              "source_seq": r.source_seq, "x": r.x, "y": r.y, "residual": r.residual,
              "drift_statistic": r.drift_statistic, "accepted": r.accepted, "reason": r.reason,
              "reference": r.reference} for r in rows[:limit]]
    return Page(items, encode_cursor(rows[limit - 1].seq) if len(rows) > limit else None)
