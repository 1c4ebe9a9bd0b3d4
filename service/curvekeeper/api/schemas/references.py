"""Reference instrument schemas: create, change, and the answer.

A reference states its uncertainty in one of three forms: ``expanded_uncertainty`` U with
``coverage_factor`` k (a normal distribution, u = U / k, GUM 4.3.3); a
``standard_uncertainty`` u (normal); or the ``half_width`` a of a ``rectangular``
(u = a / sqrt 3, GUM 4.3.7) or ``triangular`` (u = a / sqrt 6, GUM 4.3.9) distribution.
The store keeps U and k (for a half-width, U = a and k = sqrt 3 or sqrt 6), so every
answer gives U, k and u.
"""

from __future__ import annotations

import re
from datetime import date, datetime
from typing import Annotated, Any, Literal

from pydantic import MISSING, BaseModel, BeforeValidator, ConfigDict, Field

from ...channel_config import Distribution, Plain, ReferenceId, StatedUnit, Text
from .common import Answer, Page

_DATE = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")


def _date_text(v: Any) -> Any:
    # pydantic would take a number as Unix time, or a date-time at midnight; a day is YYYY-MM-DD
    if not isinstance(v, str | date) or (isinstance(v, str) and not _DATE.fullmatch(v)):
        raise ValueError("must be a date as YYYY-MM-DD text")
    return v


#: a calendar day as ISO-8601 text, YYYY-MM-DD
Day = Annotated[date, BeforeValidator(_date_text), Field(examples=["2026-03-01"])]
#: an uncertainty figure: a finite number above zero, in the reference's unit
Figure = Annotated[float, Field(strict=True, allow_inf_nan=False, gt=0.0, le=1e15)]
Factor = Annotated[float, Field(strict=True, allow_inf_nan=False, gt=0.0, le=10.0)]
Certificate = Annotated[Plain, Field(min_length=1, max_length=256, examples=["CAL-2026-0412"])]
Note = Annotated[Plain, Field(max_length=2000)]

EXPANDED = "U as the certificate states it, in the reference's unit (with coverage_factor; normal distribution)"
FACTOR = "k stated with U (default 2)"
STANDARD = "u itself, in the reference's unit (normal distribution; instead of U and k)"
HALF_WIDTH = "a, the half-width of a rectangular or triangular distribution, in the reference's unit"
DISTRIBUTION = "normal (U with k, or u) or rectangular / triangular (half_width)"
NOTE = "traceability: to which standard, by whom, under what accreditation"


class ReferenceCreate(BaseModel):
    """A new reference instrument. Give U (with k), or u, or a half-width with its distribution."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"id": "bath-ref.pt100-3", "description": "platinum resistance thermometer in the check bath",
         "unit": "degC", "expanded_uncertainty": 0.02, "coverage_factor": 2.0, "certificate": "CAL-2026-0412",
         "calibrated_on": "2026-03-01", "due_on": "2027-03-01",
         "note": "calibrated by an accredited laboratory against the national temperature scale"}]})

    id: ReferenceId
    description: Text = ""
    unit: StatedUnit
    expanded_uncertainty: Figure | None = Field(None, description=EXPANDED)
    coverage_factor: Factor | None = Field(None, description=FACTOR)
    standard_uncertainty: Figure | None = Field(None, description=STANDARD)
    half_width: Figure | None = Field(None, description=HALF_WIDTH)
    distribution: Distribution = Field("normal", description=DISTRIBUTION)
    certificate: Certificate
    calibrated_on: Day
    due_on: Day = Field(description="its calibration is due again on this day; not before calibrated_on")
    note: Note = Field("", description=NOTE)


class ReferenceUpdate(BaseModel):
    """Fields to change; a field left out stays. Any of the uncertainty fields restates the
    uncertainty (a field of the stored statement not given stays when the distribution does).
    ``retired: true`` retires the reference for good; ``id`` and ``unit`` cannot change (409)."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"certificate": "CAL-2027-0388", "calibrated_on": "2027-02-20", "due_on": "2028-02-20"},
        {"retired": True, "note": "replaced by bath-ref.pt100-4"}]})

    description: Text | MISSING = MISSING
    expanded_uncertainty: Figure | MISSING = Field(MISSING, description=EXPANDED)
    coverage_factor: Factor | MISSING = Field(MISSING, description=FACTOR)
    standard_uncertainty: Figure | MISSING = Field(MISSING, description=STANDARD)
    half_width: Figure | MISSING = Field(MISSING, description=HALF_WIDTH)
    distribution: Distribution | MISSING = Field(MISSING, description=DISTRIBUTION)
    certificate: Certificate | MISSING = MISSING
    calibrated_on: Day | MISSING = MISSING
    due_on: Day | MISSING = MISSING
    note: Note | MISSING = Field(MISSING, description=NOTE)
    retired: Literal[True] | MISSING = Field(MISSING, description="true: no new sample or calibration may name it")
    id: Any | MISSING = Field(MISSING, description="cannot change: 409")
    unit: Any | MISSING = Field(MISSING, description="cannot change: 409")

    def changes(self) -> dict[str, Any]:
        return self.model_dump()


DueState = Literal["ok", "due_soon", "overdue"]
DUE_STATE = ("against today (UTC): overdue once due_on has passed, due_soon within the server's "
             "reference_due_soon_days of it, ok before")


class ReferencePublic(Answer):
    """A reference instrument, its uncertainty in every form, and where its due date stands."""

    id: str
    description: str
    unit: str
    expanded_uncertainty: float = Field(description="U, the reference's unit (for a rectangular or triangular "
                                                    "distribution: the half-width a)")
    coverage_factor: float = Field(description="k: U / k is the standard uncertainty (sqrt 3 or sqrt 6 for a "
                                               "half-width)")
    standard_uncertainty: float = Field(description="u = U / k, the reference's unit")
    half_width: float | None = Field(description="a, for a rectangular or triangular distribution; null: normal")
    distribution: Distribution
    certificate: str
    calibrated_on: date
    due_on: date
    note: str
    retired: bool
    due_state: DueState = Field(description=DUE_STATE)
    created_at: datetime
    updated_at: datetime


class ReferencePage(Page[ReferencePublic]):
    """Reference instruments by creation order."""


class ReferenceUsed(Answer):
    """The reference instrument a calibration used, as it stood that day."""

    id: str
    unit: str
    expanded_uncertainty: float = Field(description="U (for a rectangular or triangular distribution: the "
                                                    "half-width a), the reference's unit")
    coverage_factor: float
    distribution: Distribution
    standard_uncertainty: float = Field(description="u = U / k, what enters the channel's uncertainty")
    certificate: str
    calibrated_on: str
    due_on: str
    on: str = Field(description="the calibration's day (UTC) the due date was checked against")
    overdue: bool = Field(description="its due date lay before the calibration's day")
    allow_overdue_reference: bool = Field(description="what the request said about an overdue reference")
