"""Predict, calibrate, snapshot and rollback schemas."""

from __future__ import annotations

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field

from .common import Label, Number


class PredictIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"x": [10234.5, 9000.0], "snapshot": None}]})

    x: list[Number] | list[list[Number]] = Field(min_length=1, description="raw inputs (lists for several inputs)")
    snapshot: int | None = Field(None, description="predict with a stored snapshot instead of the current curve")


class PointIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    x: Number | list[Number]
    y: Number

    def inputs(self) -> list[float]:
        return list(self.x) if isinstance(self.x, list) else [self.x]


class CalibrateIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"points": [{"x": 1000, "y": 0.0}, {"x": 20000, "y": 50.0}, {"x": 40000, "y": 100.0}],
         "include_history": False, "label": "bench check"}]})

    points: list[PointIn] = Field(default_factory=list, max_length=100_000)
    include_history: bool = False
    since: AwareDatetime | None = Field(None, description="with include_history: samples measured at or after")
    until: AwareDatetime | None = Field(None, description="with include_history: samples measured at or before")
    last: int | None = Field(None, ge=1, le=1_000_000, description="with include_history: only the newest N")
    label: Label | None = None
    dry_run: bool = Field(False, description="fit and report only: the channel is not changed (a preview)")


class SnapshotIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    label: Label | None = None


class RollbackIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [{"snapshot": 12}]})

    snapshot: int
