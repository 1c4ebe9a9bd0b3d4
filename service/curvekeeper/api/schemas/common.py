"""Shared field types."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated, Any, Generic, Literal, TypeVar

from pydantic import AfterValidator, AwareDatetime, BaseModel, BeforeValidator, ConfigDict, Field

from ...channel_config import ChannelId as ChannelId  # the schemas take the declaration's id from here
from ...channel_config import Plain

#: a finite JSON number of sane size (NaN, Infinity and |v| > 1e15 are refused)
Number = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=-1e15, le=1e15)]
#: a device's raw reading in a sample: finite, |v| <= 1e38, so an instrument's overload code
#: (9.9e37 in SCPI) is stored and held back as out of range rather than refused
Reading = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=-1e38, le=1e38)]
#: free text without control characters (PostgreSQL cannot store NUL)
Label = Annotated[Plain, Field(max_length=256)]
Source = Annotated[Plain, Field(min_length=1, max_length=128, examples=["gw-3"])]
Seq = Annotated[int, Field(strict=True, ge=0, le=2**62)]
#: a snapshot's id: a JSON integer (not "1" or true) within the store's 32-bit integers,
#: so any other id is a 404, never a 500
SnapshotId = Annotated[int, Field(strict=True, ge=-(2**31), le=2**31 - 1)]


def _date_time_text(v: Any) -> Any:
    # pydantic would take a number as Unix time; the document promises an ISO-8601 string
    if not isinstance(v, str | datetime):
        raise ValueError("must be an ISO-8601 date-time string with a time zone")
    return v


EARLIEST = datetime(1970, 1, 1, tzinfo=UTC)
#: a year short of datetime's end, so that no offset or arithmetic on a time overflows
LATEST = datetime(9999, 1, 1, tzinfo=UTC)


def _in_range(v: datetime) -> datetime:
    try:
        utc = v.astimezone(UTC)
    except OverflowError:  # e.g. 0001-01-01T00:00:00+14:00 is in year 0 in UTC
        raise ValueError("is out of range once converted to UTC") from None
    if not EARLIEST <= utc < LATEST:
        raise ValueError("must lie between 1970-01-01T00:00:00Z and 9999-01-01T00:00:00Z")
    return v


#: a time as ISO-8601 text with a time zone (e.g. 2026-12-01T10:00:00Z), from 1970 to
#: before 9999 in UTC; a number is refused
When = Annotated[AwareDatetime, BeforeValidator(_date_time_text), AfterValidator(_in_range)]

#: the drift detector's state on standardised residuals
DriftState = Literal["ok", "warning", "alarm"]
#: the curve check against the reference curve; null when the channel has no tolerance
ToleranceState = Literal["ok", "out_of_tolerance"] | None

Item = TypeVar("Item")


class Answer(BaseModel):
    """Base of the answer schemas: the document lists every field (``additionalProperties:
    false``), so an answer that gains an undocumented field fails its schema."""

    model_config = ConfigDict(extra="forbid")


class Page(Answer, Generic[Item]):
    """One page of a list; pass ``next_cursor`` as ``?cursor=`` for the next page."""

    items: list[Item]
    next_cursor: str | None = Field(description="null on the last page")


class ErrorDetail(BaseModel):
    code: str = Field(description="stable snake_case code, e.g. channel_not_found")
    message: str = Field(description="a sentence for a person")
    details: Any = Field(None, description="more about the error: the field, the index, the limit")


class ErrorBody(BaseModel):
    """The body of every error answer."""

    error: ErrorDetail


def error_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI documentation of the error answers a route gives."""
    text = {400: "malformed JSON", 401: "missing, unknown or revoked key", 403: "role or channel prefix not allowed",
            404: "unknown channel, snapshot, key or reference instrument",
            409: "conflict (exists already, a field that cannot change, not calibrated yet, or a retired or "
                 "overdue reference instrument)",
            413: "too large (body, samples, values or points)", 422: "invalid request",
            429: "rate limited (see Retry-After)", 503: "store busy or unavailable (see Retry-After)"}
    return {s: {"model": ErrorBody, "description": text[s]} for s in statuses}


#: what every authenticated route can answer besides its own errors
COMMON_ERRORS = error_responses(400, 401, 403, 413, 422, 429, 503)
