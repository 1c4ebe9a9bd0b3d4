"""Calibration records: list and read (records are immutable: no route changes one)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path
from fastapi.responses import Response

from ...actions import calibrations, report
from ..deps import Ctx, Who
from ..schemas.calibrations import CalibrationPage, CalibrationRecord, record_page
from ..schemas.common import COMMON_ERRORS, error_responses
from .channels import ChannelPath, Limit

MAX_ID = 2**31 - 1  # the record key is a 32-bit integer on PostgreSQL: a larger id is bad input
RecordId = Annotated[int, Path(ge=1, le=MAX_ID)]

router = APIRouter(prefix="/v1/channels/{channel_id}/calibrations", tags=["calibrations"],
                   responses={**COMMON_ERRORS, **error_responses(404)})


@router.get("", summary="List the channel's calibration records, oldest first")
def list_records(channel_id: ChannelPath, ctx: Ctx, who: Who, limit: Limit = 100,
                 cursor: str | None = None) -> CalibrationPage:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        page = calibrations.list_(unit.repo, channel_id, cursor=cursor, limit=limit)
    return record_page(page.items, page.next_cursor)


@router.get("/{record_id}", summary="A calibration record: as found, as left, fit, budget, verdict")
def get_record(channel_id: ChannelPath, record_id: RecordId, ctx: Ctx, who: Who) -> CalibrationRecord:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        return CalibrationRecord.model_validate(calibrations.get(unit.repo, channel_id, record_id))


@router.get("/{record_id}/report.pdf", summary="A calibration record's report, as PDF",
            response_class=Response, responses={200: {
                "content": {"application/pdf": {"schema": {"type": "string", "format": "binary"}}},
                "description": "the report (PDF): a document, not JSON"}})
def get_report(channel_id: ChannelPath, record_id: RecordId, ctx: Ctx, who: Who) -> Response:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        pdf, name = report.calibration_report(unit, channel_id, record_id)
    return Response(pdf, media_type="application/pdf",
                    headers={"Content-Disposition": f'attachment; filename="{name}"'})
