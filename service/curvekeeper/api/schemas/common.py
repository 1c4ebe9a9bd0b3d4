"""Shared field types."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any, Generic, Literal, TypeVar

from pydantic import AwareDatetime, BaseModel, BeforeValidator, ConfigDict, Field

#: a finite JSON number of sane size (NaN, Infinity and |v| > 1e15 are refused)
Number = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=-1e15, le=1e15)]
ChannelId = Annotated[str, Field(pattern=r"^[a-z0-9._-]{1,128}$", examples=["coldroom2.probe07"])]
Label = Annotated[str, Field(max_length=256)]
Source = Annotated[str, Field(min_length=1, max_length=128, examples=["gw-3"])]
Seq = Annotated[int, Field(strict=True, ge=0, le=2**62)]
#: a snapshot's id: within the store's 32-bit integers, so any other id is a 404, never a 500
SnapshotId = Annotated[int, Field(ge=-(2**31), le=2**31 - 1)]


def _date_time_text(v: Any) -> Any:
    # pydantic would take a number as Unix time; the document promises an ISO-8601 string
    if not isinstance(v, str | datetime):
        raise ValueError("must be an ISO-8601 date-time string with a time zone")
    return v


#: a time as ISO-8601 text with a time zone (e.g. 2026-12-01T10:00:00Z); a number is refused
When = Annotated[AwareDatetime, BeforeValidator(_date_time_text)]

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
            404: "unknown channel, snapshot or key", 409: "conflict (exists already, or a field that cannot change)",
            413: "too large (body, samples, values or points)", 422: "invalid request",
            429: "rate limited (see Retry-After)", 503: "store busy or unavailable (see Retry-After)"}
    return {s: {"model": ErrorBody, "description": text[s]} for s in statuses}


#: what every authenticated route can answer besides its own errors
COMMON_ERRORS = error_responses(400, 401, 403, 413, 422, 429, 503)
