"""Channels: create, list, read, change settings."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Path, Query

from ...actions import channels
from ...channel_config import CHANNEL_ID_PATTERN, Plain
from ..deps import Ctx, Who
from ..schemas.channels import ChannelCreate, ChannelCreated, ChannelPage, ChannelPublic, ChannelUpdate
from ..schemas.common import COMMON_ERRORS, error_responses

router = APIRouter(prefix="/v1/channels", tags=["channels"], responses={**COMMON_ERRORS, **error_responses(404, 409)})

ChannelPath = Annotated[str, Path(min_length=1, max_length=128, pattern=CHANNEL_ID_PATTERN)]
Limit = Annotated[int, Query(ge=1, le=1000)]
STATE_FILTER = ("ok, warning, alarm, out_of_tolerance, out_of_service, stale (no sample received for 3 times its "
                "expected_interval), or damaged (a stored state that cannot be restored)")
ARCHIVED_FILTER = "exclude: live channels only (default); include: archived ones too; only: archived ones only"
DUE_FILTER = "due_soon (due within the channel's due_soon_days, today included) or overdue (past its due_on)"


@router.post("", status_code=201, summary="Create a channel", response_model=ChannelCreated)
def create_channel(body: ChannelCreate, ctx: Ctx, who: Who) -> dict[str, Any]:
    who.require("technician")
    with ctx.work.unit(write=True) as unit:
        return channels.create(unit.repo, body, who.key_id, unit.now())


@router.get("", summary="List channels", response_model=ChannelPage)
def list_channels(ctx: Ctx, who: Who, prefix: Annotated[Plain | None, Query(max_length=128)] = None,
                  state: Annotated[str | None, Query(description=STATE_FILTER)] = None,
                  archived: Annotated[Literal["exclude", "include", "only"], Query(description=ARCHIVED_FILTER)]
                  = "exclude",
                  due_state: Annotated[str | None, Query(description=DUE_FILTER)] = None,
                  limit: Limit = 100, cursor: str | None = None) -> dict[str, Any]:
    who.require("technician")
    with ctx.work.unit(write=False) as unit:
        page = channels.list_(unit, prefix=prefix, state=state, cursor=cursor, limit=limit, archived=archived,
                              due_state=due_state)
    return {"items": page.items, "next_cursor": page.next_cursor}


@router.get("/{channel_id}", summary="A channel's configuration and summary", response_model=ChannelPublic)
def get_channel(channel_id: ChannelPath, ctx: Ctx, who: Who) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        return channels.get(unit, channel_id)


@router.patch("/{channel_id}", summary="Change learner, drift, tolerance, snapshot or calibration settings",
              response_model=ChannelPublic)
def patch_channel(channel_id: ChannelPath, body: ChannelUpdate, ctx: Ctx, who: Who) -> dict[str, Any]:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        return channels.patch(unit, channel_id, body.changes(), who.key_id)
