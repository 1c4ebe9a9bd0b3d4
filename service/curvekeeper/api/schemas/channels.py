"""Channel schemas. The configuration is declared once, in ``curvekeeper.channel_config``:
``ChannelCreate`` is that declaration with the units required; ``ChannelUpdate`` the settings a PATCH may change
(merged into the stored ones, then checked by the same declaration); ``ChannelPublic``
the configuration with the channel's summary."""

from __future__ import annotations

from datetime import date, datetime
from typing import Annotated, Any, Literal

from pydantic import MISSING, BaseModel, ConfigDict, Discriminator, Field, Tag

from ...channel_config import (
    COVERAGE,
    COVERAGE_FACTOR,
    DECISION_RULE,
    DUE_SOON,
    EXPECTED_INTERVAL,
    INTERVAL,
    OPERATING_RANGE,
    RANGE_MARGIN,
    REFERENCE,
    REQUIRE_REFERENCE,
    ChannelConfig,
    Coverage,
    CoverageFactor,
    Cusum,
    DecisionRule,
    DueSoonDays,
    Ewma,
    ExpectedInterval,
    Integer,
    IntervalDays,
    NewChannel,
    PageHinkley,
    Positive,
    RangeMargin,
    Reference,
    RequireReference,
    Text,
)
from .common import Answer

ChannelCreate = NewChannel

Section = Annotated[dict[str, Any], Field(description="fields to change; see the channel body")]


class ChannelUpdate(BaseModel):
    """Settings that may change; a field left out stays as it is, and null sets what null
    means in the channel body (``coverage_factor``: k from Student's t again; ``reference``:
    not counted; ``outlier_sd``, ``snapshot_every``: off; ``learner``, ``drift``,
    ``description``: the default). ``learner`` of the same kind (``drift`` with the same
    detector) is merged field by field; another kind replaces it. Of ``inputs`` only each
    input's ``operating_range`` may change; the rest of the inputs (name, unit, range,
    resolution), ``output`` and ``basis`` fix the curve's form and are refused with 409."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"drift": {"tolerance": 0.5}, "learner": {"kind": "rls", "forgetting": 0.999}},
                     {"coverage_factor": None, "reference": {"expanded_uncertainty": 0.02, "coverage_factor": 2.0}}]})

    description: Text | None | MISSING = MISSING
    learner: Section | None | MISSING = MISSING
    drift: Section | None | MISSING = MISSING
    outlier_sd: Annotated[Positive, Field(le=1e6)] | None | MISSING = MISSING
    snapshot_every: Annotated[Integer, Field(ge=1, le=10**9)] | None | MISSING = MISSING
    coverage: Coverage | MISSING = Field(MISSING, description=COVERAGE)
    coverage_factor: CoverageFactor | None | MISSING = Field(MISSING, description=COVERAGE_FACTOR)
    reference: Reference | None | MISSING = Field(MISSING, description=REFERENCE)
    range_margin: RangeMargin | MISSING = Field(MISSING, description=RANGE_MARGIN)
    require_reference: RequireReference | MISSING = Field(MISSING, description=REQUIRE_REFERENCE)
    decision_rule: DecisionRule | MISSING = Field(MISSING, description=DECISION_RULE)
    recalibration_interval_days: IntervalDays | MISSING = Field(MISSING, description=INTERVAL)
    due_soon_days: DueSoonDays | MISSING = Field(MISSING, description=DUE_SOON)
    expected_interval: ExpectedInterval | None | MISSING = Field(MISSING, description=EXPECTED_INTERVAL)
    inputs: list[Any] | None | MISSING = Field(MISSING, description=(
        "one object per input, in order, e.g. [{\"operating_range\": [5000, 20000]}]: only operating_range may "
        "change (" + OPERATING_RANGE + "); any other field given must equal the stored one, else 409; null: 409"))
    output: Any | MISSING = Field(MISSING, description="cannot change: 409")
    basis: Any | MISSING = Field(MISSING, description="cannot change: 409")

    def changes(self) -> dict[str, Any]:
        """The fields given (null included); a NaN stays a NaN, for the declaration to refuse."""
        return self.model_dump()


RESIDUAL_SD = ("residual standard deviation in the fitted space: 1/(y + offset) units for a reciprocal output, "
               "ln units for a log one, output units when untransformed; see residual_sd_output")
RESIDUAL_SD_OUTPUT = ("the residual standard deviation in output units: residual_sd times |dy/dz| (first-order "
                      "propagation, GUM 5.1.2), at its largest over the operating range; equal to residual_sd when "
                      "the output is not transformed; null before there is one")
OPERATING_RANGES = ("per input, the operating range in force: where the sensor is used, so where the curve is "
                    "compared (the tolerance check, max_curve_change, a calibration's curve change, snapshot "
                    "differences) and drawn by default")


class OperatingRange(BaseModel):
    """One input's operating range in force."""

    name: str = Field(description="the input's name")
    min: float = Field(description="input units")
    max: float = Field(description="input units")
    source: Literal["declared", "samples", "calibration", "input_range"] = Field(
        description="declared: the input's operating_range setting; samples: the span of the samples' inputs (those "
                    "not held back as out of range, within [min, max]); calibration: no sample yet, the span of the "
                    "last calibration's points (for a channel from before the spans were kept: [min, max]); "
                    "input_range: the whole declared [min, max], nothing known yet")


class DriftStatus(BaseModel):
    """Where the drift watch stands."""

    state: Literal["ok", "warning", "alarm"]
    statistic: float = Field(description="the detector's statistic now (compare with warning and alarm)")
    tolerance_state: Literal["ok", "out_of_tolerance"] | None = Field(
        description="the curve against its reference; null: no tolerance check")
    max_curve_change: float | None = Field(description="largest |f_now(x) - f_ref(x)| from the reference curve "
                                                       "over the operating range (see operating_range) at the last "
                                                       "check, output units")


class PageHinkleyPublic(PageHinkley, DriftStatus):
    pass


class CusumPublic(Cusum, DriftStatus):
    pass


class EwmaPublic(Ewma, DriftStatus):
    pass


#: in service the channel learns from its samples; out of service it stores them only
ServiceState = Literal["in_service", "out_of_service"]

DriftPublic = Annotated[PageHinkleyPublic | CusumPublic | EwmaPublic, Field(discriminator="detector")]


class Forecast(Answer):
    """When the channel is expected to leave tolerance, from a straight line through its
    curve's largest difference from the reference curve over measurement time since the
    last calibration (``method`` says how)."""

    leaves_tolerance_on: datetime | None = Field(
        description="where the line meets the tolerance; null: the line does not rise, or not within "
                    "not_within_days")
    low: datetime | None = Field(description="earliest date of the interval (where the line's prediction band "
                                             "meets the tolerance); null: not bounded by the data")
    high: datetime | None = Field(description="latest date of the interval; null: not bounded by the data")
    rate: float = Field(description="the drift rate: change of the largest curve difference, output units per day")
    method: str = Field(description="how the line and its interval were found")
    n_points: int = Field(description="trace points behind the line (at most one per hour of measurement time, fewer "
                                          "as the trace ages)")
    not_within_days: int | None = Field(description="set (and the dates null) when neither the line nor its band "
                                                    "reaches the tolerance within this many days of the last point")


class ChannelPublic(ChannelConfig):
    """A channel: its configuration (defaults filled in) and its summary."""

    drift: DriftPublic  # the settings plus the watch's state
    n_samples: int = Field(description="samples stored")
    n_rejected: int = Field(description="samples stored but not learned")
    rmse: float | None = Field(description="running root mean square residual of learned samples, output units")
    residual_sd: float | None = Field(description=RESIDUAL_SD)
    residual_sd_output: float | None = Field(description=RESIDUAL_SD_OUTPUT)
    operating_range: list[OperatingRange] = Field(description=OPERATING_RANGES)
    version: int = Field(description="counts every change of the channel's state")
    service_state: ServiceState = Field(description="out_of_service: samples are stored, not learned nor watched")
    calibrated: bool = Field(description="the channel has a curve (a calibration, or what it has learnt); without "
                                         "one, predict answers 409 not_calibrated")
    last_sample_at: datetime | None
    created_at: datetime
    archived: bool = Field(description="archived: its history can be read, it takes no samples nor changes (409 "
                                       "archived) and the list leaves it out unless asked")
    archived_at: datetime | None = Field(description="when it was archived; null: live")
    last_calibrated_at: datetime | None = Field(description="the latest calibration's time (its record's at)")
    due_on: date | None = Field(description="last_calibrated_at's date + recalibration_interval_days (UTC); null: "
                                            "never calibrated")
    due_state: Literal["ok", "due_soon", "overdue"] | None = Field(
        description="today (UTC) against due_on: overdue after it, due_soon from due_soon_days before it; null: "
                    "never calibrated")
    stale: bool = Field(description="no sample received for 3 times expected_interval (never while archived or "
                                    "without expected_interval); the next sample clears it")
    stale_since: datetime | None = Field(description="when it became stale: the latest sample's receipt (or the "
                                                     "channel's creation or unarchiving, when later) + 3 "
                                                     "expected_interval; null: not stale")
    forecast: Forecast | None = Field(description="when the channel is expected to leave tolerance; null: no "
                                                  "tolerance, or fewer than 5 trace points since the last "
                                                  "calibration")


class ChannelCreated(ChannelPublic):
    """The new channel, and what its settings allow but a person should know."""

    warnings: list[str] = Field(description="one sentence each, e.g. a polynomial degree above 7 swings between "
                                            "points; empty: nothing to say")


class DamageError(BaseModel):
    code: Literal["state_damaged"]
    message: str = Field(description="what is wrong and the way out: a rollback to a snapshot")


class DamagedChannel(BaseModel):
    """A channel whose stored state cannot be restored, as the list shows it; its own routes
    answer 500 ``state_damaged`` until it is rolled back to a snapshot."""

    model_config = ConfigDict(extra="forbid")

    id: str
    state: Literal["damaged"]
    error: DamageError
    n_samples: int = Field(description="samples stored")
    n_rejected: int = Field(description="samples stored but not learned")
    version: int
    last_sample_at: datetime | None
    created_at: datetime
    archived: bool
    archived_at: datetime | None


def _item_kind(v: Any) -> str:
    state = v.get("state") if isinstance(v, dict) else getattr(v, "state", None)
    return "damaged" if state == "damaged" else "channel"


ChannelItem = Annotated[Annotated[ChannelPublic, Tag("channel")] | Annotated[DamagedChannel, Tag("damaged")],
                        Discriminator(_item_kind)]


class ChannelPage(BaseModel):
    items: list[ChannelItem] = Field(
        description="channels by creation order (archived ones only when asked); one whose stored state cannot be "
                    "restored is listed with state damaged")
    next_cursor: str | None = Field(description="pass as ?cursor= for the next page; null: the last page")
