"""Predict, curve, calibrate."""

from __future__ import annotations

from contextlib import nullcontext
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Body, Query
from fastapi.responses import Response

from ...actions import curves
from ...errors import PayloadTooLarge
from ..bodies import (
    INLINE_MAX_BODY_ITEMS,
    CountedRoute,
    check_items,
    checked_body,
    count_items,
    counted,
    paused_gc,
    unvalidated,
    validate_body,
)
from ..deps import Ctx, Who
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.curves import CalibrateIn, CalibrationAnswer, CurveAnswer, PredictAnswer, PredictIn, Quality
from ..work import run_store
from .channels import ChannelPath

#: most points in one calibrate request (the schema's own bound on ``points``)
MAX_POINTS: int = next(m.max_length for m in CalibrateIn.model_fields["points"].metadata if hasattr(m, "max_length"))

# request bodies validated by the routes themselves, after counting their items
RawPredictIn = Annotated[Any, Body(), unvalidated(PredictIn)]
RawCalibrateIn = Annotated[Any, Body(), unvalidated(CalibrateIn)]

router = APIRouter(prefix="/v1/channels/{channel_id}", tags=["curves"], route_class=CountedRoute,
                   responses={**COMMON_ERRORS, **error_responses(404)})


@router.post("/predict", summary="Calibrated values with their uncertainty and quality flags",
             responses=error_responses(409))
@counted("x", lambda s: s.max_predict, "max_predict", "values")
async def predict(channel_id: ChannelPath, raw: RawPredictIn, ctx: Ctx, who: Who) -> PredictAnswer:
    body = await checked_body(raw, PredictIn, key="x", cap=ctx.settings.max_predict, noun="values",
                              setting="max_predict")
    who.require_channel(channel_id, "device")
    # 10,000 values take about 1 ms to compute: small enough for the loop
    out = await run_store(ctx.work, lambda unit: curves.predict(unit, channel_id, body.x, body.snapshot),
                          write=False, items=len(body.x) // 10)
    # the action's lists are already JSON-ready floats: model_construct costs the same for any
    # size, where validating them again would cost per value (up to 10,000 here)
    return PredictAnswer.model_construct(**{**out, "quality": Quality.model_construct(**out["quality"])})


@router.get("/curve", summary="Coefficients and the curve sampled over the input range")
def curve(channel_id: ChannelPath, ctx: Ctx, who: Who,
          points: Annotated[int, Query(ge=2)] = 101,
          over: Annotated[Literal["input", "operating"], Query(
              description="input: over each input's declared [min, max]; operating: over the operating range")]
          = "input") -> CurveAnswer:
    who.require_channel(channel_id, "technician")
    if points > ctx.settings.max_curve_points:
        raise PayloadTooLarge(f"at most {ctx.settings.max_curve_points} points")
    with ctx.work.unit(write=False) as unit:
        out = curves.curve(unit, channel_id, points, over)
    return CurveAnswer.model_validate(out)


@router.post("/calibrate", summary="Closed-form least-squares calibration, with its calibration record",
             response_model=CalibrationAnswer, responses=error_responses(409))
@counted("points", lambda s: MAX_POINTS, "max_points", "points")
def calibrate(channel_id: ChannelPath, raw: RawCalibrateIn, ctx: Ctx, who: Who) -> Response:
    # a plain def: FastAPI runs it in a worker thread, so a large body is validated off the loop
    n = count_items(raw, "points")
    check_items(n, MAX_POINTS, "points", "max_points")
    with paused_gc() if n > INLINE_MAX_BODY_ITEMS else nullcontext():
        body = validate_body(raw, CalibrateIn, "points")
        points = [(p.inputs(), p.y) for p in body.points]
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=not body.dry_run) as unit:
        out = curves.calibrate(unit, channel_id, points=points,
                               include_history=body.include_history, since=body.since, until=body.until,
                               last=body.last, label=body.label, key_id=who.key_id, dry_run=body.dry_run,
                               reason=body.reason, reference=body.reference,
                               allow_overdue_reference=body.allow_overdue_reference, at=body.at,
                               supersedes=body.supersedes,
                               conditions=body.conditions.model_dump() if body.conditions else None,
                               max_clock_skew_s=ctx.settings.max_clock_skew_s, csv=body.csv,
                               x_columns=body.x_columns, y_column=body.y_column, max_points=MAX_POINTS)
    # rendered here, in the worker thread: the record of a large calibration (a row per point,
    # as found and as left) is megabytes of JSON, which would otherwise be written on the loop
    return Response(CalibrationAnswer.model_validate(out).model_dump_json(), media_type="application/json")
