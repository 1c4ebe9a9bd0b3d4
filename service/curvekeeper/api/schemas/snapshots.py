"""Snapshot and rollback schemas, and their answers."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from .common import Answer, Label, Page, SnapshotId
from .curves import DriftSummary, RawCoefficients

REASON = ("why it was taken: manual, periodic, drift-alarm (the state just before the alarm), "
          "before-calibrate, calibration, before-rollback")


class SnapshotIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    label: Label | None = None


class RollbackIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [{"snapshot": 12}]})

    snapshot: SnapshotId


class SnapshotPublic(Answer):
    """A stored copy of a channel's model state."""

    id: int
    reason: str = Field(description=REASON)
    label: str | None
    version: int = Field(description="the channel's state version it copies")
    n_samples: int = Field(description="samples learned by then")
    created_at: datetime


class SnapshotPage(Page[SnapshotPublic]):
    """Snapshots, oldest first."""


class SnapshotCurve(SnapshotPublic):
    """A snapshot's curve summary, without the raw coefficients."""

    weights: list[float]
    basis: dict[str, Any] = Field(description="the basis setting then")
    rmse: float | None = Field(description="output units")
    drift: DriftSummary
    config: dict[str, Any] = Field(description="the channel's full configuration then")
    max_difference_from_current: float | None = Field(
        description="largest |f_snapshot(x) - f_now(x)| over the input range, output units; "
                    "null when the bases differ")


class SnapshotDetail(RawCoefficients, SnapshotCurve):
    """A snapshot with its curve summary and how far its curve is from the current one."""


class RollbackAnswer(Answer):
    """The channel as restored (its configuration and summary, as ``GET /v1/channels/{id}``
    answers it) and the snapshots involved. Configuration fields the channel answer adds
    are passed through."""

    # the configuration belongs to the channel answer's schema; let its new fields through
    model_config = ConfigDict(extra="allow")

    id: str
    description: str
    inputs: list[dict[str, Any]]
    output: dict[str, Any]
    basis: dict[str, Any]
    learner: dict[str, Any]
    drift: dict[str, Any] = Field(description="the drift settings with the state, statistic and tolerance_state")
    outlier_sd: float | None
    snapshot_every: int | None
    coverage_factor: float
    n_samples: int
    n_rejected: int
    rmse: float | None
    residual_sd: float | None
    version: int
    last_sample_at: datetime | None
    created_at: datetime
    snapshot_before: int = Field(description="snapshot of the state the rollback replaced")
    restored_snapshot: int
