"""The columnar samples body read straight into numpy columns (``SampleBatch``), its checks
vectorised: the rules of the row body (``SampleItem``: types, finite, bounds; seq's range;
t's form and range), column by column. Where a column breaks a rule, pydantic is asked about
its first bad value only, so the error (type, message, location with the sample's index) is
the one the row body gives for that value."""

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

from ...actions.samples import ChannelOutcome, SampleBatch
from ...channel_config import ReferenceId
from ...errors import InvalidRequest
from ..bodies import validate_body
from .common import EARLIEST, LATEST, Number, Reading, Seq, Source, When
from .samples import (
    AnswerForm,
    ColumnarAnswer,
    ColumnarSummary,
    IngestAnswer,
    SampleColumns,
)

COLUMNS = tuple(SampleColumns.model_fields)  # x, y, t, seq
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


def _inputs(x: list[Any]) -> NDArray[np.float64]:
    """x (numbers, or lists of numbers all of one length) as (n, k) raw inputs."""
    n = len(x)
    if n and isinstance(x[0], list):
        kinds = set(map(type, x))
        if kinds != {list}:
            bad = next(i for i, r in enumerate(x) if type(r) is not list)
            raise _refusal(list[Reading], x[bad], ("columns", "x", bad))
        k = len(x[0])
        if len(set(map(len, x))) > 1:
            bad = next(i for i, r in enumerate(x) if len(r) != k)
            raise InvalidRequest(f"sample {bad}: x holds {len(x[bad])} value(s), sample 0 holds {k}; every sample "
                                 "gives one value per input, in the channel's input order",
                                 details={"index": bad, "field": "x"})
        flat = list(chain.from_iterable(x))
        return _numbers(flat, Reading, _X_BOUND, lambda i: ("columns", "x", i // k, i % k)).reshape(n, k)
    return _numbers(x, Reading, _X_BOUND, lambda i: ("columns", "x", i)).reshape(n, 1)


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


def read_columns(raw: Any, max_skew_s: float) -> ColumnarBody:
    """A columnar body (parsed JSON) as a ``SampleBatch``: 422 (the contract's error body,
    each error's location naming the column and the first bad sample's index) for anything
    the row body would refuse, or for columns of different lengths."""
    head = validate_body(raw, _Head)
    cols = head.columns
    errors: list[dict[str, Any]] = [
        {"type": "extra_forbidden", "loc": ("body", "columns", k), "msg": "Extra inputs are not permitted", "input": v}
        for k, v in cols.items() if k not in COLUMNS]
    errors += [{"type": "missing", "loc": ("body", "columns", k), "msg": "Field required", "input": cols}
               for k in ("x", "y") if k not in cols]
    if errors:
        raise RequestValidationError(errors)
    given = {k: v for k, v in cols.items() if v is not None or k in ("x", "y")}
    for k, v in given.items():
        if not isinstance(v, list):
            raise _refusal(SampleColumns.model_fields[k].annotation, v, ("columns", k))
    y = given["y"]
    if not y:
        raise _refusal(Annotated[list[Any], Field(min_length=1)], y, ("columns", "y"))
    n = len(y)
    for k, v in given.items():
        if len(v) != n:
            raise InvalidRequest(f"columns: {k} holds {len(v)} value(s) and y {n}; every column holds one value "
                                 "per sample", details={"index": min(len(v), n), "field": k})
    X = _inputs(given["x"])
    ys = _numbers(y, Number, _Y_BOUND, lambda i: ("columns", "y", i))
    seq = _seqs(given["seq"]) if "seq" in given else None
    times = _times(given["t"], max_skew_s) if "t" in given else None
    return ColumnarBody(head.source, head.reference, head.answer, SampleBatch(x=X, y=ys, t=times, seq=seq))


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
