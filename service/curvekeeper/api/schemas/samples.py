"""Sample schemas: one channel, the gateway batch across channels, and their answers."""

from __future__ import annotations

from datetime import datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from ...channel_config import ReferenceId
from .common import Answer, ChannelId, DriftState, Number, Page, Reading, Seq, Source, ToleranceState, When
from .curves import Quality

REFERENCE = ("the reference instrument (GET /v1/references/{id}) that gave y; unknown: 404, retired: 409; "
             "a channel with require_reference refuses a sample without one (422 reference_required)")
REQUEST_REFERENCE = "the reference instrument of every sample that names none itself"


class SampleItem(BaseModel):
    model_config = ConfigDict(extra="forbid")

    x: Reading | list[Reading] = Field(description="raw input, or a list of them in the channel's input order")
    y: Number = Field(description="reference value in output units")
    t: When | None = Field(None, description="measurement time, ISO-8601 with a time zone")
    seq: Seq | None = Field(None, description="the source's sequence number: (source, seq) makes retries idempotent")
    reference: ReferenceId | None = Field(None, description=REFERENCE)

    def inputs(self) -> list[float]:
        return list(self.x) if isinstance(self.x, list) else [self.x]

    def when(self) -> datetime | None:
        return self.t


class SamplesIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"source": "gw-3", "samples": [{"x": 10234.5, "y": 24.87, "t": "2026-12-01T10:00:00Z", "seq": 17}]}]})

    source: Source | None = None
    reference: ReferenceId | None = Field(None, description=REQUEST_REFERENCE)
    samples: list[SampleItem] = Field(min_length=1)


class SampleColumns(BaseModel):
    """The samples of a request column by column: value i of each column is sample i."""

    model_config = ConfigDict(extra="forbid")

    x: list[Reading] | list[list[Reading]] = Field(
        description="raw inputs: one number a sample (one input), or one list a sample in the channel's input order")
    y: list[Number] = Field(min_length=1, description="reference values in output units, one a sample")
    t: list[When] | None = Field(None, description="measurement times, ISO-8601 with a time zone, one a sample; "
                                 "left out: the receive time")
    seq: list[Seq] | None = Field(None, description="the source's sequence numbers, one a sample: (source, seq) "
                                  "makes retries idempotent")


#: what a columnar request is answered: per sample (full) or one summary of its residuals
AnswerForm = Literal["full", "summary"]


class ColumnarSamplesIn(BaseModel):
    """The columnar samples body: the same rules as the row body (``samples``), checked
    column by column; every column holds as many values as ``y``."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"source": "gw-3", "columns": {"x": [10234.5, 10230.0], "y": [24.87, 24.9],
                                       "t": ["2026-12-01T10:00:00Z", "2026-12-01T10:01:00Z"], "seq": [17, 18]},
         "answer": "summary"}]})

    source: Source | None = None
    reference: ReferenceId | None = Field(None, description="the reference instrument of every sample")
    columns: SampleColumns
    answer: AnswerForm = Field("full", description="full: counts, held-back samples and the residuals as one "
                               "array; summary: counts by reason and the residuals' count, mean, s.d. and max |r|")


class GatewaySampleItem(SampleItem):
    channel: ChannelId


class GatewayIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"source": "gw-3", "samples": [
            {"channel": "coldroom2.probe07", "x": 10234.5, "y": 24.87, "seq": 18},
            {"channel": "coldroom2.probe08", "x": 9988.0, "y": 25.02, "seq": 19}]}]})

    source: Source | None = None
    reference: ReferenceId | None = Field(None, description=REQUEST_REFERENCE)
    samples: list[GatewaySampleItem] = Field(min_length=1)


REASON = ("why the sample was stored but not learned: outlier (beyond outlier_sd), guard (an unstable step "
          "refused), not_finite (its basis row, transformed reference or step is not a finite number), "
          "out_of_range (an input more than range_margin spans outside [min, max]) or out_of_service")
#: the reasons, as the core names a sample's status (every status but accepted)
Reason = Literal["outlier", "guard", "not_finite", "out_of_range", "out_of_service"]


class DriftBrief(Answer):
    """The channel's drift watch after the samples."""

    state: DriftState
    statistic: float = Field(description="the detector's statistic on standardised residuals")
    tolerance_state: ToleranceState


class SampleRejection(Answer):
    index: int = Field(description="position of the sample in the request")
    reason: Reason = Field(description=REASON)


class IngestAnswer(Answer):
    """What one channel learned from a request's samples."""

    accepted: int = Field(description="samples learned")
    duplicates: int = Field(description="retried samples (same source and seq) skipped")
    rejected: list[SampleRejection] = Field(description="samples stored but not learned")
    residuals: list[float | None] = Field(
        description="per sample in request order: the prior residual y - f(x), output units; null for a duplicate")
    version: int = Field(description="the channel's state version after the request")
    n_samples: int = Field(description="samples the channel holds")
    drift: DriftBrief


class ColumnarAnswer(IngestAnswer):
    """What one channel learned from a columnar request (answer full): the row body's answer
    and the channel's quality."""

    quality: Quality


class ResidualSummary(Answer):
    """The prior residuals of the stored samples whose residual is finite, output units."""

    count: int
    mean: float | None = Field(description="null when count is 0")
    sd: float | None = Field(description="sample standard deviation (n - 1); null when count < 2")
    max_abs: float | None = Field(description="largest |residual|; null when count is 0")


class ColumnarSummary(Answer):
    """What one channel learned from a columnar request (answer summary)."""

    accepted: int = Field(description="samples learned")
    duplicates: int = Field(description="retried samples (same source and seq) skipped")
    rejected: dict[Reason, int] = Field(description="samples stored but not learned, by reason")
    residuals: ResidualSummary
    version: int = Field(description="the channel's state version after the request")
    n_samples: int = Field(description="samples the channel holds")
    drift: DriftBrief
    quality: Quality


class GatewayColumns(SampleColumns):
    """A gateway batch column by column: value i of each column is sample i, ``channel``
    naming its channel."""

    channel: list[ChannelId] = Field(description="the channel of each sample, one id a sample")
    x: list[Reading] | list[list[Reading]] = Field(
        description="raw inputs: one number a sample (every channel one input), or one list a sample in its "
                    "channel's input order (channels may differ in their number of inputs)")


class ColumnarGatewayIn(BaseModel):
    """The columnar gateway body: the rules of the row body (``samples``), checked column by
    column; every column holds as many values as ``y``. All or nothing, as rows."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"source": "gw-3", "columns": {"channel": ["coldroom2.probe07", "coldroom2.humid01", "coldroom2.probe07"],
                                       "x": [[10234.5], [812.0, 21.5], [10230.0]], "y": [24.87, 55.1, 24.9],
                                       "seq": [18, 19, 20]},
         "answer": "summary"}]})

    source: Source | None = None
    reference: ReferenceId | None = Field(None, description="the reference instrument of every sample")
    columns: GatewayColumns
    answer: AnswerForm = Field("full", description="full: the row body's answer (residuals one array in request "
                               "order); summary: counts by reason, the residuals' count, mean, s.d. and max |r| over "
                               "all channels, and each channel's version, n_samples and drift")


class GatewayRejection(SampleRejection):
    channel: str


class ChannelIngest(Answer):
    """One channel's state after a gateway batch."""

    version: int
    n_samples: int
    drift: DriftBrief


class GatewayAnswer(Answer):
    """What a gateway batch did, over all its channels; indexes are positions in the request."""

    accepted: int
    duplicates: int
    rejected: list[GatewayRejection]
    residuals: list[float | None] = Field(description="per sample in request order; null for a duplicate")
    channels: dict[str, ChannelIngest] = Field(description="by channel id")


class SampleRecord(Answer):
    """A stored sample, with what learning it gave."""

    seq: int = Field(description="the sample's number in the channel, from 1")
    t: datetime = Field(description="measurement time (the receive time when the sample had none)")
    received_at: datetime
    source: str | None
    source_seq: int | None
    x: list[float] = Field(description="raw inputs in the channel's input order")
    y: float = Field(description="reference value in output units")
    residual: float | None = Field(description="prior residual, output units")
    drift_statistic: float | None
    accepted: bool = Field(description="learned; false: stored only, see reason")
    reason: Reason | None = Field(description=REASON)
    reference: str | None = Field(description="the reference instrument the sample named; null: none")


class SamplePage(Page[SampleRecord]):
    """Stored samples, oldest first."""


class GatewaySummary(Answer):
    """What a columnar gateway batch did (answer summary), over all its channels."""

    accepted: int = Field(description="samples learned")
    duplicates: int = Field(description="retried samples (same source and seq) skipped")
    rejected: dict[Reason, int] = Field(description="samples stored but not learned, by reason")
    residuals: ResidualSummary = Field(description="of the stored samples of every channel in the batch")
    channels: dict[str, ChannelIngest] = Field(description="by channel id")
