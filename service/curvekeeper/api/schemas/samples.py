"""Sample schemas: one channel, and the gateway batch across channels."""

from __future__ import annotations

from datetime import datetime

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field

from .common import ChannelId, Number, Seq, Source


class SampleItem(BaseModel):
    model_config = ConfigDict(extra="forbid")

    x: Number | list[Number] = Field(description="raw input, or a list of them in the channel's input order")
    y: Number = Field(description="reference value in output units")
    t: AwareDatetime | None = Field(None, description="measurement time, ISO-8601 with a time zone")
    seq: Seq | None = Field(None, description="the source's sequence number: (source, seq) makes retries idempotent")

    def inputs(self) -> list[float]:
        return list(self.x) if isinstance(self.x, list) else [self.x]

    def when(self) -> datetime | None:
        return self.t


class SamplesIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"source": "gw-3", "samples": [{"x": 10234.5, "y": 24.87, "t": "2026-12-01T10:00:00Z", "seq": 17}]}]})

    source: Source | None = None
    samples: list[SampleItem] = Field(min_length=1)


class GatewaySampleItem(SampleItem):
    channel: ChannelId


class GatewayIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"source": "gw-3", "samples": [
            {"channel": "coldroom2.probe07", "x": 10234.5, "y": 24.87, "seq": 18},
            {"channel": "coldroom2.probe08", "x": 9988.0, "y": 25.02, "seq": 19}]}]})

    source: Source | None = None
    samples: list[GatewaySampleItem] = Field(min_length=1)
