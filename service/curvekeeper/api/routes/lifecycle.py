"""Acknowledge a drift alarm; take a channel out of service and back; archive and unarchive it."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body

from ...actions import lifecycle
from ..deps import Ctx, Who
from ..schemas.channels import ChannelPublic
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.lifecycle import AcknowledgeIn, ArchiveIn, ServiceIn
from .channels import ChannelPath

router = APIRouter(prefix="/v1/channels/{channel_id}", tags=["lifecycle"],
                   responses={**COMMON_ERRORS, **error_responses(404, 409)})


@router.post("/acknowledge", summary="Acknowledge a drift warning or alarm (409 when there is none)")
def acknowledge(channel_id: ChannelPath, body: AcknowledgeIn, ctx: Ctx, who: Who) -> ChannelPublic:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        out = lifecycle.acknowledge(unit, channel_id, body.note, who.key_id)
    return ChannelPublic.model_validate(out)


@router.post("/service", summary="Take the channel out of service or back in (409 when it is so already)")
def service(channel_id: ChannelPath, body: ServiceIn, ctx: Ctx, who: Who) -> ChannelPublic:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        out = lifecycle.set_service(unit, channel_id, body.state, body.note, who.key_id)
    return ChannelPublic.model_validate(out)


NoteBody = Annotated[ArchiveIn | None, Body()]


@router.post("/archive", summary="Archive the channel: history kept, no samples nor changes, left out of the list "
                                 "(409 when archived already)")
def archive(channel_id: ChannelPath, ctx: Ctx, who: Who, body: NoteBody = None) -> ChannelPublic:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        out = lifecycle.archive(unit, channel_id, True, body.note if body else None, who.key_id)
    return ChannelPublic.model_validate(out)


@router.post("/unarchive", summary="Bring an archived channel back (409 when it is not archived)")
def unarchive(channel_id: ChannelPath, ctx: Ctx, who: Who, body: NoteBody = None) -> ChannelPublic:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=True) as unit:
        out = lifecycle.archive(unit, channel_id, False, body.note if body else None, who.key_id)
    return ChannelPublic.model_validate(out)
