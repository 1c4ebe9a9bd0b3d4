"""Snapshot and rollback schemas, and their answers."""

from __future__ import annotations

from datetime import datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from ...channel_config import Basis, ChannelConfig, Reason
from .channels import ChannelPublic
from .common import Answer, Label, Page, SnapshotId
from .curves import DriftSummary, RawCoefficients

REASON = ("why it was taken: manual, periodic, drift-alarm (the state just before the alarm), "
          "before-calibrate, calibration, before-rollback")


class SnapshotIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    label: Label | None = None


class RollbackIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"snapshot": 12}, {"snapshot": 12, "set_reference": True,
                                         "reason": "last night's curve followed a faulty reference"}]})

    snapshot: SnapshotId
    set_reference: bool = Field(False, strict=True, description=(
        "make the restored curve the reference for the tolerance check and the drift watch; "
        "false: the reference in force (the last calibration's curve) stays"))
    reason: Reason | None = Field(None, description="why, for the audit trail (1 to 500 characters of plain text)")


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
    basis: Basis = Field(description="the basis setting then")
    rmse: float | None = Field(description="output units")
    drift: DriftSummary
    config: ChannelConfig = Field(description="the channel's full configuration then")
    max_difference_from_current: float | None = Field(
        description="largest |f_snapshot(x) - f_now(x)| over the channel's operating range (see the channel's "
                    "operating_range), output units; null when the bases differ")


class CurveDifference(BaseModel):
    """The largest difference between two curves over a grid of the channel's operating range now
    (where the sensor is used: see the channel's ``operating_range``)."""

    against: int | None = Field(description="the other snapshot; null: the current curve")
    max: float | None = Field(description="largest |f_a(x) - f_b(x)|, output units; null when the curves cannot be "
                                          "compared (another basis, no common finite point)")
    at: float | list[float] | None = Field(description="the raw input(s) where it is largest")
    grid_points: int = Field(description="points of the grid over the operating range")
    left_out: int = Field(description="grid points where either curve is not finite")


class SnapshotDetail(RawCoefficients, SnapshotCurve):
    """A snapshot with its curve summary and how far its curve is from the current one
    (or from another snapshot's, with ``?against=``)."""

    curve_difference: CurveDifference


class RollbackAnswer(ChannelPublic):
    """The channel as restored (as ``GET /v1/channels/{id}`` answers it) and the snapshots
    involved."""

    snapshot_before: int = Field(description="snapshot of the state the rollback replaced")
    restored_snapshot: int
    reference_curve: Literal["kept", "restored_snapshot"] = Field(
        description="the reference curve in force: the one before the rollback (kept) or the restored curve")
