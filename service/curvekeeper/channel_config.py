"""The channel configuration, declared once: the body of ``POST /v1/channels``.

The declaration gives the defaults, the ranges, the cross-field rules and the
field-named errors (a ``ValidationError`` whose ``loc`` is the field at fault, e.g.
``("basis", "knots")`` or ``("inputs", 0, "min")``). ``channel_config(body)`` returns
the plain dict the core and the store take, every default filled in.
Numbers are strict: ``true`` or ``"6"`` is not a number.
"""

from __future__ import annotations

import math
import re
from typing import Annotated, Any, ClassVar, Literal, cast

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    Field,
    JsonValue,
    Tag,
    ValidationError,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from .core.conformity import DEFAULT_DUE_SOON_DAYS, DEFAULT_INTERVAL_DAYS, MAX_DAYS
from .core.drift import DETECTOR_DEFAULTS
from .core.uncertainty import HALF_WIDTH_DIVISORS

MAX_INPUTS = 8
MAX_DEGREE = 15
MAX_BASIS = 128  # basis functions (weights) of one channel
MAX_CENTERS = 64
MAX_KNOTS = 64
MAX_TEXT = 256
#: numbers of snapshot state a channel may store per sample learned: an rls state holds an
#: M x M covariance, so its snapshot_every must be at least M*M / this (M: basis terms)
SNAPSHOT_NUMBERS_PER_SAMPLE = 256


def _whole(v: Any) -> Any:
    """2.0 counts as the integer 2 (JSON has one number type); 2.5 and true do not."""
    return int(v) if isinstance(v, float) and v.is_integer() else v


def _count_or_points(v: Any) -> str | None:
    if isinstance(v, list):
        return "points"
    return "count" if isinstance(v, int | float) and not isinstance(v, bool) else None


def _point(v: Any) -> Any:
    """A centre of a one-input rbf basis may be given as a bare number."""
    return [v] if isinstance(v, int | float) and not isinstance(v, bool) else v


#: a finite JSON number of sane size
Finite = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=-1e300, le=1e300)]
Positive = Annotated[Finite, Field(gt=0.0)]
Integer = Annotated[int, BeforeValidator(_whole), Field(strict=True)]
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")


def _plain(v: str) -> str:
    """Text is stored as text on every backend: PostgreSQL refuses NUL, and no other
    control character (line breaks included) belongs in a name, unit or label."""
    if _CONTROL.search(v):
        raise ValueError("must not contain control characters (NUL, line breaks, escapes)")
    return v


#: text without control characters
Plain = Annotated[str, AfterValidator(_plain)]
Text = Annotated[Plain, Field(max_length=MAX_TEXT)]
MAX_REASON = 500
#: why a person did something (a rollback, a calibration): 1 to 500 characters of plain text
Reason = Annotated[Plain, Field(min_length=1, max_length=MAX_REASON,
                                examples=["reference probe replaced after the bench check"])]
#: lower-case letters, digits, '.', '_' and '-', not dots only: '.' and '..' are path
#: segments a URL resolves away, so such a channel could not be reached
CHANNEL_ID_PATTERN = r"^[a-z0-9._-]*[a-z0-9_-][a-z0-9._-]*$"
ChannelId = Annotated[str, Field(min_length=1, max_length=128, pattern=CHANNEL_ID_PATTERN,
                                 examples=["coldroom2.probe07"])]


def rule(loc: tuple[str | int, ...], message: str, value: Any) -> ValidationError:
    """A broken cross-field rule, located at ``loc`` (relative to the model that checks it)."""
    return ValidationError.from_exception_data("channel", [InitErrorDetails(
        type=PydanticCustomError("config_rule", message), loc=loc, input=value)])


class Strict(BaseModel):
    """Unknown fields are refused; ``null`` for a field in ``NULL_IS_DEFAULT`` means its default."""

    model_config = ConfigDict(extra="forbid", populate_by_name=False, serialize_by_alias=True)

    @model_validator(mode="before")
    @classmethod
    def _null_is_default(cls, data: Any) -> Any:
        keep = getattr(cls, "NULL_IS_DEFAULT", ())
        if isinstance(data, dict) and any(data.get(k, 0) is None for k in keep):
            return {k: v for k, v in data.items() if not (k in keep and v is None)}
        return data


def _kind(key: str, default: str, kinds: tuple[str, ...]) -> BeforeValidator:
    """Fill in the default kind of a union and refuse an unknown one, at ``<field>.<key>``."""

    def check(v: Any) -> Any:
        if v is None:
            return {key: default}
        if isinstance(v, dict):
            kind = v.get(key, default)
            if kind not in kinds:
                raise rule((key,), f"must be one of {', '.join(kinds)}, got {kind!r}", kind)
            return {key: kind, **v}
        return v

    return BeforeValidator(check)


# inputs and output -------------------------------------------------------------------
OPERATING_RANGE = ("[lo, hi] where the sensor is used, inside [min, max], input units: the curve is compared "
                   "(tolerance check, curve changes, snapshot differences) and drawn there; null: the span of the "
                   "samples' inputs, before any sample that of the last calibration's points, else [min, max]")


class InputSpec(Strict):
    """One raw input and its declared range [min, max] in its own unit."""

    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ("unit",)
    name: Text | None = Field(default=None, description="default x0, x1, ... by position")
    unit: Text = ""
    min: Finite
    max: Finite
    resolution: Positive | None = Field(default=None, description="smallest step the device reports "
                                        "(display digit or ADC step), input units; null: not stated")
    operating_range: Annotated[list[Finite], Field(min_length=2, max_length=2)] | None = Field(
        default=None, description=OPERATING_RANGE)

    @model_validator(mode="after")
    def _range(self) -> InputSpec:
        if not self.max > self.min:
            raise rule((), f"min must be less than max ({self.min:g} >= {self.max:g})", self.min)
        if self.operating_range is not None:
            lo, hi = self.operating_range
            if not hi > lo:
                raise rule(("operating_range",), f"must be [lo, hi] with lo < hi ({lo:g} >= {hi:g})",
                           self.operating_range)
            if lo < self.min or hi > self.max:
                raise rule(("operating_range",), f"must lie inside the input range [{self.min:g}, {self.max:g}]",
                           self.operating_range)
        span = self.max - self.min
        if not (math.isfinite(span) and math.isfinite(2.0 / span)):
            # the scaling to [-1, 1] divides by the span: it and its inverse must be finite numbers
            raise rule(("max",), f"the range max - min ({span:g}) is too small to scale by", self.max)
        return self


class OutputSpec(Strict):
    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ("name", "unit")
    name: Text = "value"
    unit: Text = ""
    transform: Literal["none", "reciprocal", "log"] = "none"
    offset: Finite = Field(default=0.0, description="added to y before the transform, output units")


# basis ---------------------------------------------------------------------------------
class PolyBasis(Strict):
    """Chebyshev polynomials of the scaled inputs, all terms of total degree <= degree."""

    kind: Literal["poly"] = "poly"
    degree: Annotated[Integer, Field(ge=0, le=MAX_DEGREE)] = 1
    intercept: Annotated[bool, Field(strict=True)] = True

    @model_validator(mode="after")
    def _through_origin(self) -> PolyBasis:
        if not self.intercept and self.degree < 1:
            raise rule(("degree",), "must be at least 1 when intercept is false", self.degree)
        return self


class RbfBasis(Strict):
    """Gaussian bumps at ``centers`` (scaled units, width in scaled units)."""

    kind: Literal["rbf"]
    centers: Annotated[
        Annotated[Annotated[Integer, Field(ge=2, le=MAX_CENTERS)], Tag("count")]
        | Annotated[list[Annotated[list[Finite], BeforeValidator(_point)]],
                    Field(min_length=1, max_length=MAX_CENTERS), Tag("points")],
        Discriminator(_count_or_points, custom_error_type="config_rule",
                      custom_error_message=f"must be a count (2 to {MAX_CENTERS}) or a list of centre points"),
    ] = Field(default=8, description="a count (evenly spread, one input) or the centre points, one "
                                     "coordinate per input")
    width: Annotated[Positive, Field(le=100.0)] | None = Field(default=None, description="default: the centre spacing")
    intercept: Annotated[bool, Field(strict=True)] = True


class LogPolyBasis(Strict):
    """Powers of ln x (one input above zero), e.g. [0, 1, 3] for a thermistor."""

    kind: Literal["log_poly"]
    powers: Annotated[list[Annotated[Integer, Field(ge=0, le=7)]], Field(min_length=1, max_length=8)] = [0, 1, 3]

    @model_validator(mode="after")
    def _distinct(self) -> LogPolyBasis:
        if len(set(self.powers)) != len(self.powers):
            raise rule(("powers",), "must not repeat a power", self.powers)
        return self


class HingeBasis(Strict):
    """Piecewise-linear in one input with ``knots`` strictly inside its range."""

    kind: Literal["hinge"]
    knots: Annotated[list[Finite], Field(min_length=1, max_length=MAX_KNOTS)]
    intercept: Annotated[bool, Field(strict=True)] = True

    @model_validator(mode="after")
    def _increasing(self) -> HingeBasis:
        if any(b <= a for a, b in zip(self.knots, self.knots[1:], strict=False)):
            raise rule(("knots",), "must be strictly increasing", self.knots)
        return self


Basis = Annotated[PolyBasis | RbfBasis | LogPolyBasis | HingeBasis, Field(discriminator="kind"),
                  _kind("kind", "poly", ("poly", "rbf", "log_poly", "hinge"))]


# learner -------------------------------------------------------------------------------
class ConstantSchedule(Strict):
    kind: Literal["constant"]
    eta0: Annotated[Positive, Field(le=1e6)] = 0.05


class InverseTimeSchedule(Strict):
    kind: Literal["inverse_time"]
    eta0: Annotated[Positive, Field(le=1e6)] = 0.5
    tau: Positive = 100.0
    power: Annotated[Positive, Field(le=2.0)] = 0.6


class StepSchedule(Strict):
    kind: Literal["step"]
    eta0: Annotated[Positive, Field(le=1e6)] = 0.1
    gamma: Annotated[Positive, Field(le=1.0)] = 0.5
    every: Annotated[Integer, Field(ge=1, le=10**9)] = 1000


class NormalizedSchedule(Strict):
    """Normalised LMS, eta = mu / (eps + |phi|^2) with 0 < mu < 2."""

    kind: Literal["normalized"] = "normalized"
    mu: Annotated[Positive, Field(lt=2.0)] = 0.1
    eps: Positive = 1e-6


Schedule = Annotated[ConstantSchedule | InverseTimeSchedule | StepSchedule | NormalizedSchedule,
                     Field(discriminator="kind"),
                     _kind("kind", "normalized", ("constant", "inverse_time", "step", "normalized"))]


class SgdLearner(Strict):
    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ("schedule",)
    kind: Literal["sgd"] = "sgd"
    schedule: Schedule = NormalizedSchedule()
    l2: Annotated[Finite, Field(ge=0.0, le=1e6)] = Field(default=0.0, description="pull toward the reference weights")
    huber: Annotated[Positive, Field(le=1e3)] | None = Field(default=None, description="clip residuals at huber s.d.")


class RlsLearner(Strict):
    kind: Literal["rls"]
    forgetting: Annotated[Positive, Field(le=1.0)] = 0.999
    initial_covariance: Annotated[Positive, Field(le=1e12)] | None = Field(
        default=None, description="P0 of a prior P0*I; null: start from the least-squares fit of the "
                                  "first samples")
    covariance_bound: Annotated[Finite, Field(ge=1.0, le=1e12)] = Field(
        default=10.0, description="trace(P) never exceeds this multiple of its trace right after the last "
                                  "calibration or initialisation")


Learner = Annotated[SgdLearner | RlsLearner, Field(discriminator="kind"), _kind("kind", "sgd", ("sgd", "rls"))]


# drift ---------------------------------------------------------------------------------
PH, CU, EW = (DETECTOR_DEFAULTS[k] for k in ("page_hinkley", "cusum", "ewma"))
Threshold = Annotated[Finite, Field(ge=0.0, le=1e6)]
Clip = Annotated[Finite, Field(ge=0.0, le=1e3, description="residuals clipped at +-clip s.d.; 0: off")]


class DriftBase(Strict):
    tolerance: Positive | None = Field(default=None, description="largest curve change from the reference, output "
                                                         "units; null: no tolerance check")

    @model_validator(mode="after")
    def _alarm_above_warning(self) -> DriftBase:
        warning, alarm = getattr(self, "warning"), getattr(self, "alarm")  # noqa: B009 (set by subclasses)
        if not alarm > warning:
            raise rule(("alarm",), f"must be greater than drift.warning ({alarm:g} <= {warning:g})", alarm)
        return self


class PageHinkley(DriftBase):
    detector: Literal["page_hinkley"] = "page_hinkley"
    delta: Threshold = PH["delta"]
    warning: Threshold = PH["warning"]
    alarm: Threshold = PH["alarm"]
    mean_window: Annotated[Integer, Field(ge=10, le=10**7)] = PH["mean_window"]
    clip: Clip = PH["clip"]


class Cusum(DriftBase):
    detector: Literal["cusum"]
    k: Threshold = CU["k"]
    warning: Threshold = CU["warning"]
    alarm: Threshold = CU["alarm"]
    clip: Clip = CU["clip"]


class Ewma(DriftBase):
    detector: Literal["ewma"]
    lambda_: Annotated[Positive, Field(le=1.0)] = Field(default=EW["lambda"], alias="lambda")
    warning: Threshold = EW["warning"]
    alarm: Threshold = EW["alarm"]
    clip: Clip = EW["clip"]


DETECTORS = tuple(DETECTOR_DEFAULTS)
Drift = Annotated[PageHinkley | Cusum | Ewma, Field(discriminator="detector"),
                  _kind("detector", "page_hinkley", DETECTORS)]


# the channel ---------------------------------------------------------------------------
#: a reference instrument's id: the same form as a channel's
ReferenceId = Annotated[str, Field(min_length=1, max_length=128, pattern=CHANNEL_ID_PATTERN,
                                   examples=["bath-ref.pt100-3"])]
#: the distribution behind a stated uncertainty: normal (U with k), or the half-width a of a
#: rectangular or triangular distribution
Distribution = Literal["normal", "rectangular", "triangular"]


class Reference(Strict):
    """The reference instrument's expanded uncertainty as its certificate states it: u = U / k."""

    expanded_uncertainty: Annotated[Finite, Field(ge=0.0)] = Field(description="U, output units")
    coverage_factor: Annotated[Positive, Field(le=10.0)] = Field(default=2.0, description="k the certificate "
                                                                                          "states with U")
    distribution: Distribution = Field(default="normal", description=(
        "normal: U with k; rectangular or triangular: U is the half-width a and k must be sqrt 3 or sqrt 6 "
        "(GUM 4.3.7, 4.3.9)"))
    instrument: ReferenceId | None = Field(default=None, description=(
        "the reference instrument (GET /v1/references/{id}) these figures were taken from by the last "
        "calibration that named one; null: typed in"))

    @model_validator(mode="after")
    def _divisor(self) -> Reference:
        divisor = HALF_WIDTH_DIVISORS.get(self.distribution)
        if divisor is not None and not math.isclose(self.coverage_factor, divisor, rel_tol=1e-12):
            raise rule(("coverage_factor",), f"must be {divisor!r} (sqrt {round(divisor * divisor)}) for a "
                       f"{self.distribution} distribution, whose U is the half-width a", self.coverage_factor)
        return self


#: the settings of the expanded uncertainty and of the out-of-range hold (PATCH takes them too)
Coverage = Annotated[Finite, Field(ge=0.5, le=0.9999)]
CoverageFactor = Annotated[Positive, Field(le=10.0)]
RangeMargin = Annotated[Finite, Field(ge=0.0, le=1e6)]
COVERAGE = "coverage probability of the expanded uncertainty"
COVERAGE_FACTOR = ("fixed k of the expanded uncertainty k u; null: k from Student's t at the effective degrees "
                   "of freedom and coverage")
REFERENCE = "the reference instrument's stated uncertainty; null: not counted"
RequireReference = Annotated[bool, Field(strict=True)]
REQUIRE_REFERENCE = ("samples must name their reference instrument (per sample or per request); one without "
                     "is refused with 422 reference_required")
RANGE_MARGIN = "a sample whose input lies more than this many spans outside [min, max] is held as out of range"
#: the calibration settings (PATCH takes them too)
DecisionRule = Literal["simple", "guarded"]
IntervalDays = Annotated[Integer, Field(ge=1, le=3650)]
DueSoonDays = Annotated[Integer, Field(ge=0, le=MAX_DAYS)]
DECISION_RULE = ("how a calibration states conformity with drift.tolerance (ILAC-G8:2019): simple (pass when "
                 "|error| <= tolerance) or guarded (guard band w = U: pass when |error| <= tolerance - U, fail when "
                 "|error| > tolerance + U, otherwise conditional)")
INTERVAL = (f"days from a calibration to the next one due (default {DEFAULT_INTERVAL_DAYS}: yearly, common "
            "practice); each calibration record suggests a new one, applied only by a PATCH")
#: at most ten years between samples, seconds
MAX_EXPECTED_INTERVAL = 10 * 366 * 86400.0
ExpectedInterval = Annotated[Positive, Field(le=MAX_EXPECTED_INTERVAL)]
EXPECTED_INTERVAL = ("seconds between the channel's samples; with no sample received for 3 times this, the channel is "
                     "stale; null: not watched")
DUE_SOON = (f"days before the due date from which the channel is due_soon (default {DEFAULT_DUE_SOON_DAYS}, "
            "common practice)")


EXAMPLE: dict[str, Any] = {
    "id": "coldroom2.probe07", "description": "thermistor probe, rack 2",
    "inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000, "resolution": 0.1}],
    "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
    "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
    "learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.2}},
    "drift": {"detector": "page_hinkley", "tolerance": 0.3},
    "outlier_sd": 6.0, "snapshot_every": 1000,
    "reference": {"expanded_uncertainty": 0.02, "coverage_factor": 2.0},
}
_UNIONS = {"basis", "learner", "schedule", "drift", "centers"}
_TAGS = {"poly", "rbf", "log_poly", "hinge", "sgd", "rls", "constant", "inverse_time", "step", "normalized",
         "count", "points", *DETECTORS}


def _without_tags(loc: tuple[str | int, ...]) -> tuple[str | int, ...]:
    """pydantic puts the chosen member of a union in ``loc`` (basis.poly.degree): drop it."""
    return tuple(p for i, p in enumerate(loc) if not (p in _TAGS and i and loc[i - 1] in _UNIONS))


class ChannelSettings(Strict):
    """A channel's configuration without its id; see the module docstring."""

    model_config = ConfigDict(extra="forbid", serialize_by_alias=True)
    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ("description", "output", "basis", "learner", "drift")

    description: Text = ""
    inputs: Annotated[list[InputSpec], Field(min_length=1, max_length=MAX_INPUTS)]
    output: OutputSpec = OutputSpec()
    basis: Basis = PolyBasis()
    learner: Learner = SgdLearner()
    drift: Drift = PageHinkley()
    outlier_sd: Annotated[Positive, Field(le=1e6)] | None = Field(
        6.0, description="residual s.d. beyond which a sample is stored but not learned; null: off")
    snapshot_every: Annotated[Integer, Field(ge=1, le=10**9)] | None = Field(
        1000, description="take a snapshot every N samples; null: off")
    coverage: Coverage = Field(default=0.95, description=COVERAGE)
    coverage_factor: CoverageFactor | None = Field(default=None, description=COVERAGE_FACTOR)
    reference: Reference | None = Field(default=None, description=REFERENCE)
    range_margin: RangeMargin = Field(default=1.0, description=RANGE_MARGIN)
    require_reference: RequireReference = Field(default=False, description=REQUIRE_REFERENCE)
    decision_rule: DecisionRule = Field(default="simple", description=DECISION_RULE)
    recalibration_interval_days: IntervalDays = Field(default=DEFAULT_INTERVAL_DAYS, description=INTERVAL)
    due_soon_days: DueSoonDays = Field(default=DEFAULT_DUE_SOON_DAYS, description=DUE_SOON)
    expected_interval: ExpectedInterval | None = Field(default=None, description=EXPECTED_INTERVAL)

    @model_validator(mode="wrap")
    @classmethod
    def _name_the_field(cls, data: Any, handler: Any) -> Any:
        try:
            return handler(data)
        except ValidationError as exc:
            raise ValidationError.from_exception_data(exc.title, [InitErrorDetails(
                type=PydanticCustomError(e["type"], e["msg"].replace("{", "{{").replace("}", "}}")),
                loc=_without_tags(e["loc"]), input=e.get("input")) for e in exc.errors()]) from None

    @model_validator(mode="after")
    def _fits_the_inputs(self) -> ChannelSettings:
        names: set[str] = set()
        for i, spec in enumerate(self.inputs):
            if spec.name is None:
                spec.name = f"x{i}"
            if spec.name in names:
                raise rule(("inputs", i, "name"), f"{spec.name!r} is used twice", spec.name)
            names.add(spec.name)
        self.basis = _fit_basis(self.basis, self.inputs)
        plain: dict[str, Any] = {"basis": self.basis.model_dump(), "inputs": self.inputs,
                                 "learner": {"kind": self.learner.kind}}
        floor = min_snapshot_every(plain)
        if self.snapshot_every is not None and self.snapshot_every < floor:
            m = basis_size(plain["basis"], len(self.inputs))
            raise rule(("snapshot_every",), f"must be at least {floor} (or null) for an rls learner with {m} basis "
                       f"terms: each snapshot holds its {m}x{m} covariance", self.snapshot_every)
        return self


def basis_size(basis: dict[str, Any], inputs: int) -> int:
    """M, the number of basis terms (weights) of a fitted ``basis`` over ``inputs`` inputs."""
    kind, intercept = basis["kind"], basis.get("intercept", True)
    if kind == "poly":
        return math.comb(basis["degree"] + inputs, inputs) - (0 if intercept else 1)
    if kind == "rbf":
        return len(basis["centers"]) + (1 if intercept else 0)
    if kind == "log_poly":
        return len(basis["powers"])
    return len(basis["knots"]) + 1 + (1 if intercept else 0)


def min_snapshot_every(config: dict[str, Any]) -> int:
    """The smallest snapshot_every allowed for a configuration (the plain dict): the state a
    snapshot holds (M*M numbers for rls, M for sgd) over ``SNAPSHOT_NUMBERS_PER_SAMPLE``."""
    m = basis_size(config["basis"], len(config["inputs"]))
    state = m * m if config["learner"]["kind"] == "rls" else m
    return max(1, math.ceil(state / SNAPSHOT_NUMBERS_PER_SAMPLE))


def _fit_basis(b: PolyBasis | RbfBasis | LogPolyBasis | HingeBasis, inputs: list[InputSpec]
               ) -> PolyBasis | RbfBasis | LogPolyBasis | HingeBasis:
    """The rules between the basis and the inputs; an rbf count becomes its centre points."""
    d = len(inputs)
    lo, hi = inputs[0].min, inputs[0].max
    if isinstance(b, PolyBasis):
        size = math.comb(b.degree + d, d) - (0 if b.intercept else 1)
        if size > MAX_BASIS:
            raise rule(("basis", "degree"), f"gives {size} terms ({d} inputs, degree {b.degree}); at most "
                       f"{MAX_BASIS} are allowed", b.degree)
        if not b.intercept and d > 1:
            raise rule(("basis", "intercept"), "false needs a single input", b.intercept)
        return b
    if isinstance(b, RbfBasis):
        if isinstance(b.centers, int):
            if d != 1:
                raise rule(("basis", "centers"), "must list the centre points when there are several inputs",
                           b.centers)
            n = b.centers
            points = [[lo + (hi - lo) * i / (n - 1)] for i in range(n)]
        else:
            points = b.centers
            for i, p in enumerate(points):
                if len(p) != d:
                    raise rule(("basis", "centers", i), f"must have {d} coordinate(s), one per input", p)
        width = b.width if b.width is not None else 2.0 / max(len(points) - 1, 1)
        return RbfBasis(kind="rbf", centers=points, width=width, intercept=b.intercept)
    if d != 1:
        raise rule(("basis", "kind"), f"{b.kind} takes a single input", b.kind)
    if isinstance(b, LogPolyBasis):
        if lo <= 0.0:
            raise rule(("inputs", 0, "min"), "must be above zero for the log_poly basis (ln x)", lo)
        return b
    if b.knots[0] <= lo or b.knots[-1] >= hi:
        raise rule(("basis", "knots"), f"must lie inside the input range ({lo:g}, {hi:g})", b.knots)
    return b


class ChannelConfig(ChannelSettings):
    """The body of ``POST /v1/channels``: the settings and the channel's id."""

    model_config = ConfigDict(extra="forbid", serialize_by_alias=True,
                              json_schema_extra={"examples": [cast(JsonValue, EXAMPLE)]})

    id: ChannelId


def _stated(v: str) -> str:
    if not v.strip():
        raise ValueError("must name the unit (e.g. degC, ohm, mV); it is empty")
    return v


#: a unit as a new channel states it: some text besides spaces
StatedUnit = Annotated[Text, AfterValidator(_stated), Field(examples=["degC"])]


class NewInput(InputSpec):
    """An input of a new channel: its unit is required."""

    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ()
    unit: StatedUnit


class NewOutput(OutputSpec):
    """The output of a new channel: its unit is required."""

    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ("name",)
    unit: StatedUnit


class NewChannel(ChannelConfig):
    """The body of ``POST /v1/channels``: a channel states the unit of its output and of each
    input. Channels stored before units were required keep their empty units: what PATCH
    re-validates is ``ChannelConfig``, which does not ask for them."""

    NULL_IS_DEFAULT: ClassVar[tuple[str, ...]] = ("description", "basis", "learner", "drift")
    inputs: Annotated[list[NewInput], Field(min_length=1, max_length=MAX_INPUTS)]  # type: ignore[assignment]
    output: NewOutput


#: the highest polynomial degree taken without a warning (common practice: beyond it a
#: polynomial fitted to points swings between them, Runge's phenomenon)
QUIET_DEGREE = 7


def warnings_for(config: dict[str, Any]) -> list[str]:
    """What a validated configuration allows but a person should know, one sentence each."""
    basis = config["basis"]
    if basis["kind"] == "poly" and basis["degree"] > QUIET_DEGREE:
        return [f"basis.degree is {basis['degree']}: a polynomial of degree above {QUIET_DEGREE} swings between "
                f"the points it is fitted to (Runge's phenomenon); prefer degree {QUIET_DEGREE} or less, or a "
                f"hinge or rbf basis"]
    return []


def channel_config(body: Any) -> dict[str, Any]:
    """A channel body validated (``ValidationError`` names the field) with every default
    filled in, as plain JSON types: what the store keeps and the core takes."""
    model = ChannelConfig if isinstance(body, dict) and "id" in body else ChannelSettings
    return model.model_validate(body).model_dump(mode="json")
