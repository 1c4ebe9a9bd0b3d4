"""Snapshots, rollback and events."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path, Query

from ...actions import events, snapshots
from ...channel_config import Plain
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.events import EventPage
from ..schemas.snapshots import (
    RollbackAnswer,
    RollbackIn,
    SnapshotDetail,
    SnapshotIn,
    SnapshotPage,
    SnapshotPublic,
)
from .channels import ChannelPath, Limit

MAX_ID = 2**31 - 1  # the snapshot key is a 32-bit integer on PostgreSQL: a larger id is bad input
SnapshotId = Annotated[int, Path(ge=-MAX_ID - 1, le=MAX_ID)]

router = APIRouter(prefix="/v1/channels/{channel_id}", tags=["snapshots"],
                   responses={**COMMON_ERRORS, **error_responses(404)})


@router.get("/snapshots", summary="List snapshots")
def list_snapshots(channel_id: ChannelPath, ctx: Ctx, who: Who, limit: Limit = 100,
                   cursor: str | None = None) -> SnapshotPage:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        page = snapshots.list_(unit.repo, channel_id, cursor=cursor, limit=limit)
    return SnapshotPage.model_validate(page, from_attributes=True)


@router.post("/snapshots", status_code=201, summary="Take a snapshot")
def take_snapshot(channel_id: ChannelPath, ctx: Ctx, who: Who, body: SnapshotIn | None = None) -> SnapshotPublic:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        out = snapshots.take(unit.repo, channel_id, body.label if body else None, who.key_id)
    return SnapshotPublic.model_validate(out)


@router.get("/snapshots/{snapshot_id}", summary="One snapshot with its curve summary")
def get_snapshot(channel_id: ChannelPath, snapshot_id: SnapshotId, ctx: Ctx, who: Who,
                 against: Annotated[int | None, Query(ge=-MAX_ID - 1, le=MAX_ID, description=(
                     "compare the snapshot's curve with this snapshot's instead of the current one"))] = None
                 ) -> SnapshotDetail:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        out = snapshots.get(unit, channel_id, snapshot_id, against)
    return SnapshotDetail.model_validate(out)


@router.post("/rollback", summary="Restore a snapshot's curve (the current state is snapshotted first)")
def rollback(channel_id: ChannelPath, body: RollbackIn, ctx: Ctx, who: Who) -> RollbackAnswer:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        out = snapshots.rollback(unit, channel_id, body.snapshot, who.key_id, set_reference=body.set_reference,
                                 reason=body.reason)
    return RollbackAnswer.model_validate(out)


@router.get("/events", summary="Drift alarms, rollbacks, calibrations, guards, settings changes")
def list_events(channel_id: ChannelPath, ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None,
                kind: Annotated[Plain | None, Query(max_length=32)] = None) -> EventPage:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        page = events.list_(unit.repo, channel_id, kind=kind, cursor=cursor, limit=limit)
    return EventPage.model_validate(page, from_attributes=True)
