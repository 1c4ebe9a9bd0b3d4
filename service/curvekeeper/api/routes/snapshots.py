"""Snapshots, rollback and events."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query
from fastapi import Path as FastApiPath

from ...actions import events, snapshots
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.curves import RollbackIn, SnapshotIn
from .channels import ChannelPath, Limit

MAX_ID = 2**31 - 1  # the snapshot key is a 32-bit integer on PostgreSQL: a larger id is bad input
SnapshotId = Annotated[int, FastApiPath(le=MAX_ID)]

router = APIRouter(prefix="/v1/channels/{channel_id}", tags=["snapshots"],
                   responses={**COMMON_ERRORS, **error_responses(404)})


@router.get("/snapshots", summary="List snapshots")
def list_snapshots(channel_id: ChannelPath, ctx: Ctx, who: Who, limit: Limit = 100,
                   cursor: str | None = None) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        page = snapshots.list_(unit.repo, channel_id, cursor=cursor, limit=limit)
    return {"items": page.items, "next_cursor": page.next_cursor}


@router.post("/snapshots", status_code=201, summary="Take a snapshot")
def take_snapshot(channel_id: ChannelPath, ctx: Ctx, who: Who, body: SnapshotIn | None = None) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        return snapshots.take(unit.repo, channel_id, body.label if body else None, who.key_id)


@router.get("/snapshots/{snapshot_id}", summary="One snapshot with its curve summary")
def get_snapshot(channel_id: ChannelPath, snapshot_id: SnapshotId, ctx: Ctx, who: Who,
                 against: Annotated[int | None, Query(le=MAX_ID, description="compare the snapshot's curve with "
                                                      "this snapshot's instead of the current one")] = None
                 ) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        return snapshots.get(unit, channel_id, snapshot_id, against)


@router.post("/rollback", summary="Restore a snapshot (the current state is snapshotted first)")
def rollback(channel_id: ChannelPath, body: RollbackIn, ctx: Ctx, who: Who) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        return snapshots.rollback(unit, channel_id, body.snapshot, who.key_id)


@router.get("/events", summary="Drift alarms, rollbacks, calibrations, guards, settings changes")
def list_events(channel_id: ChannelPath, ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None,
                kind: Annotated[str | None, Query(max_length=32)] = None) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        page = events.list_(unit.repo, channel_id, kind=kind, cursor=cursor, limit=limit)
    return {"items": page.items, "next_cursor": page.next_cursor}
