"""The columnar samples bodies (one channel's, and the gateway's split by channel) read
straight into numpy columns (``SampleBatch``), their checks shared and vectorised: the rules
of the row body (``SampleItem``: types, finite, bounds; seq's range; t's form and range),
column by column. Where a column breaks a rule, pydantic is asked about its first bad value
only, so the error (type, message, location with the sample's index in the request) is the
one the row body gives for that value."""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import lru_cache
from itertools import chain
from typing import Annotated, Any, cast

import numpy as np
from fastapi.exceptions import RequestValidationError
from numpy.typing import NDArray
from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError

from ...actions.samples import ChannelOutcome, GatewayBatch, SampleBatch, summarise_residuals
from ...channel_config import ChannelId, ReferenceId
from ...errors import InvalidRequest
from ..bodies import validate_body
from .common import EARLIEST, LATEST, Number, Reading, Seq, Source, When
from .samples import (
    AnswerForm,
    ColumnarAnswer,
    ColumnarSummary,
    GatewayAnswer,
    GatewayColumns,
    GatewaySummary,
    IngestAnswer,
    SampleColumns,
)

#: JSON numbers as Python's and FastAPI's parsers give them (bool is not one)
_NUMBERS = frozenset({float, int})
_Y_BOUND = 1e15  # Number
_X_BOUND = 1e38  # Reading
_SEQ_MAX = 2**62  # Seq


class _Head(BaseModel):
    """The body around its columns (which are read apart)."""

    model_config = ConfigDict(extra="forbid")

    source: Source | None = None
    reference: ReferenceId | None = None
    columns: dict[str, Any]
    answer: AnswerForm = "full"


@dataclass(frozen=True)
class ColumnarBody:
    source: str | None
    reference: str | None
    answer: str
    batch: SampleBatch


@dataclass(frozen=True)
class ColumnarGatewayBody:
    source: str | None
    reference: str | None
    answer: str
    batch: GatewayBatch


def is_columnar(raw: Any) -> bool:
    """A samples body in columns (``columns``), not rows (``samples``)."""
    return isinstance(raw, dict) and "columns" in raw and "samples" not in raw


def column_count(raw: Any) -> int:
    """The most values any column of a columnar body holds (0 where there are none): the
    body's samples, for the batch cap, counted before anything is read."""
    cols = raw.get("columns") if isinstance(raw, dict) else None
    if not isinstance(cols, dict):
        return 0
    return max((len(v) for v in cols.values() if isinstance(v, list)), default=0)


@lru_cache(maxsize=16)
def _adapter(annotation: Any) -> TypeAdapter[Any]:
    return TypeAdapter(annotation)


def _refusal(annotation: Any, value: Any, loc: tuple[str | int, ...]) -> RequestValidationError:
    """The 422 pydantic gives ``value`` as ``annotation`` at ``loc`` in the body."""
    try:
        _adapter(annotation).validate_python(value)
    except ValidationError as exc:
        return RequestValidationError([{**e, "loc": ("body", *loc, *e["loc"])} for e in exc.errors(include_url=False)])
    # not reached while the vectorised rules are pydantic's: name the value all the same
    return RequestValidationError([{"type": "value_error", "loc": ("body", *loc), "msg": "Value error, invalid value",
                                    "input": value, "ctx": {"error": "invalid value"}}])


def _first_refused(annotation: Any, values: list[Any]) -> int:
    adapter = _adapter(annotation)
    for i, v in enumerate(values):
        try:
            adapter.validate_python(v)
        except ValidationError:
            return i
    return 0


def _numbers(values: list[Any], annotation: Any, bound: float, at: Any) -> NDArray[np.float64]:
    """``values`` (JSON numbers, finite, |v| <= bound) as float64; else the 422 of the first
    bad one at location ``at(i)``."""
    if set(map(type, values)) <= _NUMBERS:
        try:
            a = np.array(values, dtype=np.float64)
        except OverflowError:  # an integer beyond float range
            bad = _first_refused(annotation, values)
        else:
            with np.errstate(invalid="ignore"):
                ok = np.abs(a) <= bound  # False for NaN and infinities too
            if ok.all():
                return a
            bad = int(np.argmin(ok))
    else:
        bad = next(i for i, v in enumerate(values) if type(v) not in _NUMBERS)
    raise _refusal(annotation, values[bad], at(bad))


def _inputs(x: list[Any], groups: list[NDArray[np.intp]] | None = None) -> list[NDArray[np.float64]]:
    """x (numbers, or lists of numbers) as raw inputs, one (m, k) array per group of request
    indexes (``groups``; None: one group, every sample): within a group every list holds the
    same number of values (a gateway's channels may differ). Locations are request indexes."""
    n = len(x)
    if not (n and isinstance(x[0], list)):
        a = _numbers(x, Reading, _X_BOUND, lambda i: ("columns", "x", i))
        return [a.reshape(n, 1)] if groups is None else [a[g].reshape(g.size, 1) for g in groups]
    kinds = set(map(type, x))
    if kinds != {list}:
        bad = next(i for i, r in enumerate(x) if type(r) is not list)
        raise _refusal(list[Reading], x[bad], ("columns", "x", bad))
    widths = np.fromiter(map(len, x), dtype=np.intp, count=n)
    odd = [(int(g[np.argmax(w != w[0])]), int(g[0])) for g in (groups or [np.arange(n)])
           if ((w := widths[g]) != w[0]).any()]  # (the group's first sample of another width, its first)
    if odd:
        bad, first = min(odd)
        raise InvalidRequest(f"sample {bad}: x holds {widths[bad]} value(s), sample {first} holds {widths[first]}; "
                             "every sample gives one value per input, in the channel's input order",
                             details={"index": bad, "field": "x"})
    starts = np.concatenate(([0], np.cumsum(widths)))

    def at(i: int) -> tuple[str | int, ...]:  # value i of the flattened column: (sample, input)
        s = int(np.searchsorted(starts, i, side="right")) - 1
        return ("columns", "x", s, i - int(starts[s]))

    flat = _numbers(list(chain.from_iterable(x)), Reading, _X_BOUND, at)
    if groups is None:
        return [flat.reshape(n, int(widths[0]))]
    return [flat[starts[g][:, None] + np.arange(widths[g[0]])] for g in groups]


def _seqs(seq: list[Any]) -> NDArray[np.int64]:
    if set(map(type, seq)) <= {int}:
        try:
            a = np.array(seq, dtype=np.int64)
        except OverflowError:
            bad = _first_refused(Seq, seq)
        else:
            ok = (a >= 0) & (a <= _SEQ_MAX)
            if ok.all():
                return a
            bad = int(np.argmin(ok))
    else:
        bad = next(i for i, v in enumerate(seq) if type(v) is not int)
    raise _refusal(Seq, seq[bad], ("columns", "seq", bad))


#: the common form of a time, which pydantic and ``datetime.fromisoformat`` read alike
_ISO_TIME = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(?:\.\d{1,6})?(?:Z|[+-]\d{2}:\d{2})")


def _common_times(t: list[Any]) -> list[datetime] | None:
    """t when every value has the common form and lies in the row body's range (about
    0.4 us a value, pydantic's parse 1 us); None: pydantic reads the column (other forms,
    and every error, as the row body gives them)."""
    if set(map(type, t)) != {str}:
        return None
    match = _ISO_TIME.fullmatch
    try:
        out = [datetime.fromisoformat(v) if match(v) else None for v in t]
        if any(v is None for v in out):
            return None
        times = cast(list[datetime], out)
        if min(times) < EARLIEST or max(times) >= LATEST:
            return None
    except (ValueError, OverflowError):  # e.g. day 31 of a 30-day month, an offset past a year's end
        return None
    return times


def _times(t: list[Any], max_skew_s: float) -> list[datetime | None]:
    """t as aware datetimes (the row body's rules, pydantic's parser); none more than
    ``max_skew_s`` ahead of this server's clock (as ``deps.check_times``)."""
    times: list[datetime | None] | None = cast("list[datetime | None] | None", _common_times(t))
    if times is None:
        try:
            times = _adapter(list[When]).validate_python(t)
        except ValidationError as exc:
            raise RequestValidationError([{**e, "loc": ("body", "columns", "t", *e["loc"])}
                                          for e in exc.errors(include_url=False)]) from None
    latest = datetime.now(UTC) + timedelta(seconds=max_skew_s)
    bad = next((i for i, v in enumerate(times) if v is not None and v > latest), None)
    if bad is not None:
        raise InvalidRequest(f"sample {bad}: t is more than {max_skew_s:g} s ahead of the server's clock",
                             details={"index": bad, "field": "t"})
    return times


def _given(raw: Any, model: type[BaseModel]) -> tuple[_Head, dict[str, list[Any]], int]:
    """The body's head and its columns (of ``model``'s fields; those of them without a default
    required), each a list of one value a sample: 422 for an unknown, missing or non-list
    column, an empty y, or columns of different lengths (then the field and the index where
    the shorter one ends)."""
    head = validate_body(raw, _Head)
    cols = head.columns
    fields = model.model_fields
    errors: list[dict[str, Any]] = [
        {"type": "extra_forbidden", "loc": ("body", "columns", k), "msg": "Extra inputs are not permitted", "input": v}
        for k, v in cols.items() if k not in fields]
    required = [k for k, f in fields.items() if f.is_required()]
    errors += [{"type": "missing", "loc": ("body", "columns", k), "msg": "Field required", "input": cols}
               for k in required if k not in cols]
    if errors:
        raise RequestValidationError(errors)
    given = {k: v for k, v in cols.items() if v is not None or k in required}
    for k, v in given.items():
        if not isinstance(v, list):
            raise _refusal(fields[k].annotation, v, ("columns", k))
    y = given["y"]
    if not y:
        raise _refusal(Annotated[list[Any], Field(min_length=1)], y, ("columns", "y"))
    n = len(y)
    for k, v in given.items():
        if len(v) != n:
            raise InvalidRequest(f"columns: {k} holds {len(v)} value(s) and y {n}; every column holds one value "
                                 "per sample", details={"index": min(len(v), n), "field": k})
    return head, given, n


def _batches(given: dict[str, list[Any]], max_skew_s: float, groups: list[NDArray[np.intp]] | None = None
             ) -> list[SampleBatch]:
    """The columns read and checked (x, y, seq, t, in that order; locations name the column
    and the request index), as one ``SampleBatch`` per group of request indexes (None: one
    of every sample)."""
    xs = _inputs(given["x"], groups)
    ys = _numbers(given["y"], Number, _Y_BOUND, lambda i: ("columns", "y", i))
    seq = _seqs(given["seq"]) if "seq" in given else None
    times = _times(given["t"], max_skew_s) if "t" in given else None
    if groups is None:
        return [SampleBatch(x=xs[0], y=ys, t=times, seq=seq)]
    return [SampleBatch(x=X, y=ys[g], t=None if times is None else [times[i] for i in g.tolist()],
                        seq=None if seq is None else seq[g]) for X, g in zip(xs, groups, strict=True)]


def read_columns(raw: Any, max_skew_s: float) -> ColumnarBody:
    """A columnar body (parsed JSON) as a ``SampleBatch``: 422 (the contract's error body,
    each error's location naming the column and the first bad sample's index) for anything
    the row body would refuse, or for columns of different lengths."""
    head, given, _ = _given(raw, SampleColumns)
    return ColumnarBody(head.source, head.reference, head.answer, _batches(given, max_skew_s)[0])


def _channel_groups(channel: list[Any]) -> dict[str, NDArray[np.intp]]:
    """The request indexes of each channel's samples (channels in order of first appearance);
    422 at the first value that is not a channel id."""
    bad = next((i for i, c in enumerate(channel) if type(c) is not str), None)
    groups: dict[str, list[int]] = {}
    if bad is None:
        for i, c in enumerate(channel):
            groups.setdefault(c, []).append(i)
        adapter = _adapter(ChannelId)
        for c, idx in groups.items():  # in order of first appearance: the first bad one is the earliest
            try:
                adapter.validate_python(c)
            except ValidationError:
                bad = idx[0]
                break
    if bad is not None:
        raise _refusal(ChannelId, channel[bad], ("columns", "channel", bad))
    return {c: np.array(idx, dtype=np.intp) for c, idx in groups.items()}


def read_gateway_columns(raw: Any, max_skew_s: float) -> ColumnarGatewayBody:
    """A columnar gateway body (parsed JSON) split by ``channel`` into one ``SampleBatch`` a
    channel: the checks of ``read_columns``, every location a request index; x's lists may
    differ in length between channels, not within one."""
    head, given, n = _given(raw, GatewayColumns)
    groups = _channel_groups(given["channel"])
    batches = _batches(given, max_skew_s, list(groups.values()))
    parts = {c: (g, b) for (c, g), b in zip(groups.items(), batches, strict=True)}
    return ColumnarGatewayBody(head.source, head.reference, head.answer, GatewayBatch(n, parts))


def answer_of(out: ChannelOutcome, form: str | None) -> IngestAnswer | ColumnarAnswer | ColumnarSummary:
    """The answer to a samples request: the row body's (``form`` None), or a columnar
    body's in the form it asked for."""
    if form == "summary":  # a few numbers: validated, so a field an action gains or loses is a 500, not lost
        return ColumnarSummary.model_validate(
            {"accepted": out.accepted, "duplicates": out.duplicates, "rejected": out.rejected_counts(),
             "residuals": out.residual_summary(), "version": out.version, "n_samples": out.n_samples,
             "drift": out.drift, "quality": out.quality})
    fields = {"accepted": out.accepted, "duplicates": out.duplicates, "rejected": out.rejected,
              "residuals": out.residuals, "version": out.version, "n_samples": out.n_samples, "drift": out.drift}
    if form is None:
        # validated here, once (FastAPI takes the instance as it is): an answer holds one residual
        # per sample, and at these sizes validating costs about what model_construct does
        return IngestAnswer.model_validate(fields)
    return ColumnarAnswer.model_validate({**fields, "quality": out.quality})


def gateway_answer_of(out: dict[str, Any], form: str) -> GatewayAnswer | GatewaySummary:
    """The answer to a gateway batch (``ingest_gateway``'s outcome, alarms taken out) in the
    form it asked for: full (the row body's) or summary."""
    if form != "summary":
        return GatewayAnswer.model_validate(out)
    counts: dict[str, int] = {}
    for r in out["rejected"]:
        counts[r["reason"]] = counts.get(r["reason"], 0) + 1
    resid = np.array([np.nan if r is None else r for r in out["residuals"]], dtype=np.float64)
    return GatewaySummary.model_validate(
        {"accepted": out["accepted"], "duplicates": out["duplicates"], "rejected": counts,
         "residuals": summarise_residuals(resid), "channels": out["channels"]})
