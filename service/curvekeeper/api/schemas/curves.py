"""Predict, curve and calibrate schemas, and their answers."""

from __future__ import annotations

from typing import Literal

from pydantic import MISSING, BaseModel, ConfigDict, Field

from ...channel_config import Basis, InputSpec, OutputSpec, Reason, ReferenceId
from .calibrations import ConditionsIn, RecordBody
from .channels import OPERATING_RANGES, RESIDUAL_SD, RESIDUAL_SD_OUTPUT, OperatingRange
from .common import Answer, DriftState, Label, Number, SnapshotId, ToleranceState, When
from .references import ReferenceUsed


class PredictIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"x": [10234.5, 9000.0], "snapshot": None}]})

    x: list[Number] | list[list[Number]] = Field(min_length=1, description="raw inputs (lists for several inputs)")
    snapshot: SnapshotId | None = Field(None, description="predict with a stored snapshot instead of the current curve")


class PointIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    x: Number | list[Number]
    y: Number

    def inputs(self) -> list[float]:
        return list(self.x) if isinstance(self.x, list) else [self.x]


class CalibrateIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"points": [{"x": 1000, "y": 0.0}, {"x": 20000, "y": 50.0}, {"x": 40000, "y": 100.0}],
         "include_history": False, "label": "bench check", "reason": "yearly check against the reference bath"}]})

    points: list[PointIn] = Field(default_factory=list, max_length=100_000)
    csv: str | None = Field(None, min_length=1, description=(
        "the points as CSV text instead of points (a file's contents, as the page and the command line send it): "
        "lines starting with # are skipped; fields separated by ',', ';' or a tab; a first row that is not all "
        "numbers is a header; columns by x_columns and y_column, by default the header's x (x1 ... xn) and y, "
        "else the first columns in order, the inputs then the reference value"))
    x_columns: list[str | int] | None = Field(None, min_length=1, max_length=8, description=(
        "with csv: the input columns, one per input in the channel's order, by header name or position (1 = the "
        "first column)"))
    y_column: str | int | None = Field(None, description="with csv: the reference value's column, by header name "
                                                         "or position")
    include_history: bool = False
    since: When | None = Field(None, description="with include_history: samples measured at or after")
    until: When | None = Field(None, description="with include_history: samples measured at or before")
    last: int | None = Field(None, strict=True, ge=1, le=1_000_000,
                             description="with include_history: only the newest N")
    label: Label | None = None
    dry_run: bool = Field(False, description="fit and report only: the channel is not changed (a preview)")
    reason: Reason | None = Field(None, description="why, for the audit trail (1 to 500 characters of plain text)")
    reference: ReferenceId | None = Field(None, description=(
        "the reference instrument the points were measured with (GET /v1/references/{id}); the channel's reference "
        "setting then takes its U and k, and the record lists it. Unknown: 404; retired: 409; due before the "
        "calibration's date: 409 reference_overdue"))
    allow_overdue_reference: bool = Field(False, strict=True, description=(
        "calibrate against a reference whose due date has passed; the choice is recorded"))
    at: When | None = Field(None, description="when the calibration was done (not in the future; default now): the "
                                              "record's time, which due dates count from")
    supersedes: SnapshotId | None = Field(None, description="the id of this channel's calibration record this "
                                                            "calibration corrects (a record is superseded once)")
    conditions: ConditionsIn | None = Field(None, description="the calibration's conditions, kept in its record")


# answers -----------------------------------------------------------------------------------------

UNCERTAINTY = ("combined standard uncertainty u per value (GUM: curve, scatter, reference, resolution), output "
               "units; null where y is withheld or before the channel has a residual estimate")
EXPANDED = "expanded uncertainty U = k u per value, output units; null where u is"
COVERAGE_K = ("coverage factor k per value: the channel's fixed coverage_factor, or (null setting) Student's t at "
              "the effective degrees of freedom for the channel's coverage; null where u is")
DOF = "effective degrees of freedom of u (Welch-Satterthwaite); null: infinite, or u unknown"
WITHHELD = ("why y is withheld: outside_domain (the output transform has no value there, e.g. at or below the "
            "offset's zero of a reciprocal channel) or not_finite (the curve overflows); null: y is given")

Withheld = Literal["outside_domain", "not_finite"]


class Quality(Answer):
    """What a data user should know about every value the channel gives now."""

    calibrated: bool = Field(description="the channel has a curve (a calibration, or learnt samples)")
    drift: DriftState = Field(description="the drift watch: ok, warning or alarm")
    tolerance: Literal["ok", "out_of_tolerance"] = Field(
        description="the curve against its reference curve (ok when the channel has no tolerance)")
    service: Literal["in_service", "out_of_service"] = Field(
        description="out of service: samples are stored, not learned")
    warming_up: bool = Field(description="the residual s.d. rests on too few degrees of freedom for the outlier gate")
    stale: bool = Field(description="the channel has received no sample for 3 times its expected_interval "
                                    "(false without expected_interval)")


class PredictAnswer(Answer):
    """Calibrated values for the inputs, in request order, each with its uncertainty."""

    y: list[float | None] = Field(description="calibrated values, output units; null where withheld (see reason)")
    reason: list[Withheld | None] = Field(description=WITHHELD)
    u: list[float | None] = Field(description=UNCERTAINTY)
    U: list[float | None] = Field(description=EXPANDED)
    k: list[float | None] = Field(description=COVERAGE_K)
    dof: list[float | None] = Field(description=DOF)
    out_of_range: list[bool] = Field(description="per value: an input outside its declared [min, max]")
    quality: Quality
    version: int = Field(description="the state version (of the snapshot, when one was asked for)")
    unit: str = Field(description="the output unit")


class DriftSummary(Answer):
    """The drift watch: the detector on residuals and the curve check against the reference."""

    state: DriftState
    statistic: float = Field(description="the detector's statistic on standardised residuals")
    warning: float = Field(description="the statistic's warning threshold")
    alarm: float = Field(description="the statistic's alarm threshold")
    tolerance_state: ToleranceState
    max_curve_change: float | None = Field(
        description="largest |f_now(x) - f_ref(x)| over the operating range (see operating_range), output units; "
                    "null: not checked")


class RawCoefficients(Answer):
    """Coefficients in raw input units, present only where the basis has such a form
    (poly, log_poly); ``poly_*`` only for a single-input poly basis. Listed first among the
    bases of an answer, its fields come after the other bases' fields, as the answer sends them."""

    raw_terms: list[int] | list[list[int]] | MISSING = Field(
        MISSING, description="each coefficient's exponent (of ln x for log_poly; per input for several inputs)")
    raw_term_names: list[str] | MISSING = Field(
        MISSING, description="each coefficient's term as written in reports, the page and the command line: 1, raw, "
                             "raw^2, current*temperature, ln(raw)^3 (input names from the channel)")
    raw_coefficients: list[float] | MISSING = MISSING
    raw_coefficient_sd: list[float] | None | MISSING = Field(
        MISSING, description="standard deviations; null without a covariance or residual estimate")
    poly_coefficients: list[float] | MISSING = Field(MISSING, description="c0 + c1 x + c2 x^2 ... in raw units")
    poly_coefficient_sd: list[float] | None | MISSING = MISSING


class CurvePoint(Answer):
    x: float | list[float] = Field(description="raw input (a list for several inputs)")
    y: float | None = Field(description="output units; null where withheld")
    u: float | None = Field(description=UNCERTAINTY)
    U: float | None = Field(description=EXPANDED)
    k: float | None = Field(description=COVERAGE_K)
    lower: float | None = Field(description="y - U")
    upper: float | None = Field(description="y + U")


class CurveBody(Answer):
    """The curve answer's fields other than the raw coefficients."""

    basis: Basis = Field(description="the channel's basis setting")
    inputs: list[InputSpec] = Field(description="the channel's inputs")
    output: OutputSpec = Field(description="the channel's output setting")
    weights: list[float] = Field(description="basis weights (on scaled inputs)")
    over: Literal["input", "operating"] = Field(description="the points span the input range [min, max] or the "
                                                            "operating range")
    points: list[CurvePoint]
    operating_range: list[OperatingRange] = Field(description=OPERATING_RANGES)
    n_samples: int
    rmse: float | None = Field(description="output units; null before any fit or sample")
    residual_sd: float | None = Field(description=RESIDUAL_SD)
    residual_sd_output: float | None = Field(description=RESIDUAL_SD_OUTPUT)
    drift: DriftSummary
    quality: Quality
    version: int


class CurveAnswer(RawCoefficients, CurveBody):
    """The channel's current curve: coefficients and the curve sampled over the input range
    or the operating range."""


class FitReport(Answer):
    """A least-squares fit: weights, their s.d. and how well the fit matches the points."""

    weights: list[float]
    weight_sd: list[float] | None = Field(description="null where the fit leaves them undetermined")
    residual_sd: float | None = Field(description="the fit's residual s.d. in the fitted (transformed) space; see "
                                                  "residual_sd_output")
    residual_sd_output: float | None = Field(description="the fit's residual s.d. in output units: residual_sd times "
                                                         "|dy/dz| (first order, GUM 5.1.2), at its largest over the "
                                                         "operating range; equal to residual_sd when untransformed")
    rmse_output: float = Field(description="output units")
    r_squared: float | None
    n: int = Field(description="points fitted")
    max_curve_change: float | None = Field(description="largest |f_new(x) - f_before(x)| over the operating range "
                                                       "(after the fit: its points count in the span of inputs), "
                                                       "output units; null where a curve has no finite value")


class CsvColumns(Answer):
    """What was read from the csv text."""

    x_columns: list[str] = Field(description="the input columns, by header name (or 'column N' without a header)")
    y_column: str = Field(description="the reference value's column")
    rows: int = Field(description="data rows read")


class CalibrationAnswer(RawCoefficients, FitReport):
    """The fit report; with dry_run, what the fit would be (``applied`` false)."""

    reference: ReferenceUsed | None = Field(description="the reference instrument named; null: none")

    csv: CsvColumns | None = Field(description="the columns read from the csv text; null: no csv was given")
    snapshot_before: int | None = Field(description="snapshot of the state before the fit; null on a dry run")
    snapshot_after: int | None = Field(description="snapshot of the fitted state; null on a dry run")
    version: int
    applied: bool
    calibration: int | None = Field(description="the stored calibration record's id; null on a dry run")
    record: RecordBody = Field(description="the calibration record (on a dry run: what it would record)")
