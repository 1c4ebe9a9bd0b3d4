"""Calibration records: the conditions a calibrate request states, and the record as answered."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from ...channel_config import Basis, DecisionRule, Plain
from .common import Answer, Number, Page
from .references import ReferenceUsed

#: a point's and a record's verdict (ILAC-G8:2019); not_applicable: nothing to judge (no
#: tolerance set, or no indication, e.g. the as-found of a channel that had no curve)
Verdict = Literal["pass", "fail", "conditional", "not_applicable"]
ConditionName = Annotated[Plain, Field(min_length=1, max_length=64, examples=["ambient_temperature"])]
ConditionValue = Annotated[Plain, Field(max_length=256)] | Number


class ConditionsIn(BaseModel):
    """The conditions of a calibration: named values (ambient temperature, humidity, bath
    used...) and free text."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"values": {"ambient_temperature": "21.4 degC", "humidity_percent": 45}, "note": "stirred bath, 10 min soak"}]})

    values: dict[ConditionName, ConditionValue] = Field(default_factory=dict, max_length=50)
    note: Annotated[Plain, Field(max_length=2000)] | None = None


class Conditions(Answer):
    values: dict[str, str | float]
    note: str | None


class RecordPoint(Answer):
    """One calibration point as found (the curve before the fit) or as left (after it)."""

    x: float | list[float] = Field(description="the raw reading (a list for several inputs)")
    reference_value: float = Field(description="the reference's value, output units")
    indicated: float | None = Field(description="the curve's value at x, output units; null: the channel had no "
                                                "curve (as found) or the curve has no value there")
    error: float | None = Field(description="indicated - reference_value, output units")
    tolerance: float | None = Field(description="the channel's drift.tolerance, output units; null: none set")
    U: float | None = Field(description="expanded uncertainty of the calibration at x (the as-left budget), output "
                                        "units: the guard band of the guarded rule")
    verdict: Verdict


class Fit(Answer):
    """The least-squares fit the calibration made."""

    basis: Basis
    n: int = Field(description="points fitted (the request's points and any stored samples)")
    dof: int = Field(description="residual degrees of freedom, n - basis terms")
    coefficients: list[float]
    coefficient_sd: list[float] | None = Field(description="standard deviations; null where undetermined")
    coefficients_of: Literal["raw_terms", "basis_weights"] = Field(
        description="raw_terms: coefficients of the raw-unit terms (see terms); basis_weights: weights of the "
                    "channel's basis on scaled inputs")
    terms: list[int] | list[list[int]] | None = Field(description="each raw coefficient's exponent")
    residual_sd: float | None = Field(description="residual s.d., output units; null without degrees of freedom")
    r_squared: float | None


class BudgetRow(Answer):
    source: str
    type: Literal["A", "B"]
    distribution: Literal["normal", "rectangular", "t"]
    u: float | None = Field(description="standard uncertainty of the source, in its own units")
    sensitivity: float | None = Field(description="output units per unit of the source")
    contribution: float | None = Field(description="|sensitivity| u, output units")
    dof: float | None = Field(description="degrees of freedom; null: infinite")


class RecordBudget(Answer):
    """The as-left curve's uncertainty budget (GUM) at the point where U is largest."""

    x: float | list[float] | None = Field(description="the raw reading it is evaluated at")
    rows: list[BudgetRow]
    u_combined: float | None = Field(description="combined standard uncertainty, output units")
    dof_effective: float | None = Field(description="Welch-Satterthwaite; null: infinite")
    k: float | None
    U: float | None = Field(description="expanded uncertainty k u_combined, output units")


class IntervalSuggestion(Answer):
    """The next recalibration interval by the staircase (ILAC-G24 / OIML D 10 method 1);
    applied only by a PATCH of recalibration_interval_days."""

    days: int
    current_days: int
    factor: float
    basis: Literal["in_tolerance", "out_of_tolerance", "no_tolerance", "no_as_found"]
    method: str


class RecordTable(Answer):
    """Which points the as-found and as-left tables hold."""

    points: int = Field(description="the calibration's points (every one judged for the verdicts)")
    shown: int = Field(description="the points in the tables: all, or at most 1,000")
    selection: Literal["all", "largest_as_left_error"] = Field(
        description="all; or, for a larger fit, the points with the largest as-left |error|, in their order")


class RecordBody(Answer):
    """What a calibration found and left (on a dry run: what it would record)."""

    as_found: list[RecordPoint]
    as_left: list[RecordPoint]
    table: RecordTable | None = Field(None, description="which points the tables hold (null: all, in records "
                                                        "made before it was stated)")
    fit: Fit
    budget: RecordBudget
    decision_rule: DecisionRule
    verdict: Verdict = Field(description="the as-left points' overall verdict: fail if any fails, else conditional "
                                         "if any is (or one could not be judged), else pass")
    as_found_verdict: Verdict = Field(description="the as-found points' overall verdict")
    interval_suggestion: IntervalSuggestion
    conditions: Conditions
    by: str | None = Field(description="the label of the key that calibrated (its id when it has no label)")
    references: list[ReferenceUsed] = Field(description="the reference instruments named by the calibration, as they "
                                                      "stood that day (certificate, due date, U and k)")


class CalibrationRecord(RecordBody):
    """A stored calibration record: immutable; a correction is a new record naming it."""

    id: int
    channel: str
    version: int = Field(description="the channel version the calibration made")
    at: datetime = Field(description="when the calibration was done (due dates count from it)")
    created_at: datetime = Field(description="when the record was stored")
    key_id: str | None
    supersedes: int | None = Field(description="the record this one corrects")
    superseded_by: int | None = Field(description="the record that corrects this one")


CalibrationPage = Page[CalibrationRecord]


def record_page(items: list[dict[str, Any]], next_cursor: str | None) -> CalibrationPage:
    return CalibrationPage.model_validate({"items": items, "next_cursor": next_cursor})

