"""Predict, curve, calibrate."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query

from ...actions import curves
from ...errors import PayloadTooLarge
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.curves import CalibrateIn, CalibrationAnswer, CurveAnswer, PredictAnswer, PredictIn
from ..work import run_store
from .channels import ChannelPath

router = APIRouter(prefix="/v1/channels/{channel_id}", tags=["curves"],
                   responses={**COMMON_ERRORS, **error_responses(404)})


@router.post("/predict", summary="Calibrated values with standard uncertainty")
async def predict(channel_id: ChannelPath, body: PredictIn, ctx: Ctx, who: Who) -> PredictAnswer:
    who.require_channel(channel_id, "device")
    if len(body.x) > ctx.settings.max_predict:
        raise PayloadTooLarge(f"at most {ctx.settings.max_predict} values per request")
    # 10,000 values take about 1 ms to compute: small enough for the loop
    out = await run_store(ctx.work, lambda unit: curves.predict(unit, channel_id, body.x, body.snapshot),
                          write=False, items=len(body.x) // 10)
    # the action's lists are already JSON-ready floats: model_construct costs the same for any
    # size, where validating them again would cost per value (up to 10,000 here)
    return PredictAnswer.model_construct(**out)


@router.get("/curve", summary="Coefficients and the curve sampled over the input range")
def curve(channel_id: ChannelPath, ctx: Ctx, who: Who,
          points: Annotated[int, Query(ge=2)] = 101) -> CurveAnswer:
    who.require_channel(channel_id, "technician")
    if points > ctx.settings.max_curve_points:
        raise PayloadTooLarge(f"at most {ctx.settings.max_curve_points} points")
    with ctx.work.unit(write=False) as unit:
        out = curves.curve(unit, channel_id, points)
    return CurveAnswer.model_validate(out)


@router.post("/calibrate", summary="Closed-form least-squares calibration")
def calibrate(channel_id: ChannelPath, body: CalibrateIn, ctx: Ctx, who: Who) -> CalibrationAnswer:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=not body.dry_run) as unit:
        out = curves.calibrate(unit, channel_id, points=[(p.inputs(), p.y) for p in body.points],
                               include_history=body.include_history, since=body.since, until=body.until,
                               last=body.last, label=body.label, key_id=who.key_id, dry_run=body.dry_run)
    return CalibrationAnswer.model_validate(out)
