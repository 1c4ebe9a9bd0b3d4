"""Samples: learn (one channel, or a gateway batch), and export."""

from __future__ import annotations

import io
import time
from collections.abc import Callable
from typing import Annotated, Any, TypeVar

from fastapi import APIRouter, Body, Query, Response
from pydantic import BaseModel
from starlette.concurrency import run_in_threadpool

from ...actions import samples
from ...actions.samples import GatewayBatch, SampleBatch
from ...csvcells import TextSafeWriter
from ..bodies import INLINE_MAX_BODY_ITEMS, CountedRoute, check_items, checked_body, counted, unvalidated
from ..deps import Ctx, Who, check_times
from ..schemas.common import COMMON_ERRORS, error_responses
from ..schemas.samples import (
    ColumnarAnswer,
    ColumnarGatewayIn,
    ColumnarSamplesIn,
    ColumnarSummary,
    GatewayAnswer,
    GatewayIn,
    GatewaySummary,
    IngestAnswer,
    SampleItem,
    SamplePage,
    SamplesIn,
)
from ..schemas.samples_columns import (
    answer_of,
    column_count,
    gateway_answer_of,
    is_columnar,
    read_columns,
    read_gateway_columns,
)
from ..work import run_store
from .channels import ChannelPath, Limit

# request bodies validated by the routes themselves, after counting their items
RawSamplesIn = Annotated[Any, Body(), unvalidated(SamplesIn | ColumnarSamplesIn)]
RawGatewayIn = Annotated[Any, Body(), unvalidated(GatewayIn | ColumnarGatewayIn)]

T = TypeVar("T")

router = APIRouter(tags=["samples"], route_class=CountedRoute, responses={**COMMON_ERRORS, **error_responses(404)})


async def _off_loop_if_large(n: int, fn: Callable[..., T], *args: Any) -> T:
    """``fn(*args)`` for a body of ``n`` samples: on the loop when small, else in a worker thread."""
    return fn(*args) if n <= INLINE_MAX_BODY_ITEMS else await run_in_threadpool(fn, *args)


async def _answer(n: int, build: Callable[[], BaseModel]) -> BaseModel | Response:
    """The answer to a batch of ``n`` samples. A large one (a residual a sample) is built and
    rendered in a worker thread: on the loop it held predicts up for milliseconds
    (tests/bench/ingest_bench.py, predict under ingest)."""
    if n <= INLINE_MAX_BODY_ITEMS:
        return build()
    rendered = await run_in_threadpool(lambda: build().model_dump_json())
    return Response(rendered, media_type="application/json")


@router.post("/v1/channels/{channel_id}/samples", summary="Learn from samples, in order")
@counted("samples", lambda s: s.max_batch, "max_batch", "samples")
async def post_samples(channel_id: ChannelPath, raw: RawSamplesIn, ctx: Ctx, who: Who
                       ) -> IngestAnswer | ColumnarAnswer | ColumnarSummary:
    """Rows (``samples``: one object a sample; answered per sample) or columns (``columns``:
    one array a field, read into numpy and checked column by column; answered per sample or,
    with ``"answer": "summary"``, in one summary of the residuals). The same rules either way."""
    started = time.monotonic()  # the busy timeout counts from here, validation in a worker thread included
    items: list[SampleItem] | SampleBatch
    form: str | None = None
    if is_columnar(raw):
        n = column_count(raw)
        check_items(n, ctx.settings.max_batch, "samples", "max_batch")
        skew = ctx.settings.max_clock_skew_s
        # vectorised, yet t (when given) is parsed per value: a large body is read in a worker thread
        col = await _off_loop_if_large(n, read_columns, raw, skew)
        items, source, reference, form = col.batch, col.source, col.reference, col.answer
        who.require_channel(channel_id, "device")
    else:
        body = await checked_body(raw, SamplesIn, key="samples", cap=ctx.settings.max_batch, noun="samples",
                                  setting="max_batch")
        who.require_channel(channel_id, "device")
        check_times(body.samples, ctx.settings)
        items, source, reference = body.samples, body.source, body.reference
    out = await run_store(ctx.work, lambda unit: samples.ingest(unit, channel_id, items, source, who.key_id, reference),
                          write=True, items=len(items), started=started)
    ctx.metrics.observe_samples(out.accepted, len(out.rejected), out.duplicates, out.alarms)
    return await _answer(len(items), lambda: answer_of(out, form))  # type: ignore[return-value]


@router.post("/v1/samples", summary="Gateway batch across channels")
@counted("samples", lambda s: s.max_batch, "max_batch", "samples")
async def post_gateway(raw: RawGatewayIn, ctx: Ctx, who: Who) -> GatewayAnswer | GatewaySummary:
    """Rows (``samples``, ``channel`` on each) or columns (``columns``, with a ``channel``
    column; read into numpy, split by channel; ``"answer": "summary"`` for a summary). All or
    nothing: an unknown channel (404) or a bad sample (422) refuses the whole batch, names the
    first such sample's index in the request and its channel, and stores nothing."""
    started = time.monotonic()
    items: list[tuple[str, SampleItem]] | GatewayBatch
    form = "full"
    if is_columnar(raw):
        n = column_count(raw)
        check_items(n, ctx.settings.max_batch, "samples", "max_batch")
        skew = ctx.settings.max_clock_skew_s
        col = await _off_loop_if_large(n, read_gateway_columns, raw, skew)
        items, source, reference, form = col.batch, col.source, col.reference, col.answer
        cids, n = list(col.batch.parts), col.batch.n
    else:
        body = await checked_body(raw, GatewayIn, key="samples", cap=ctx.settings.max_batch, noun="samples",
                                  setting="max_batch")
        check_times(body.samples, ctx.settings)
        items, source, reference = [(s.channel, s) for s in body.samples], body.source, body.reference
        cids = list(dict.fromkeys(s.channel for s in body.samples))
        n = len(items)
    for cid in cids:
        who.require_channel(cid, "device")
    out = await run_store(ctx.work, lambda unit: samples.ingest_gateway(unit, items, source, who.key_id, reference),
                          write=True, items=n, started=started)
    ctx.metrics.observe_samples(out["accepted"], len(out["rejected"]), out["duplicates"], out.pop("alarms"))
    return await _answer(n, lambda: gateway_answer_of(out, form))  # type: ignore[return-value]


CSV_FIELDS = ["seq", "t", "received_at", "source", "source_seq", "x", "y", "residual", "drift_statistic",
              "accepted", "reason", "reference"]


@router.get("/v1/channels/{channel_id}/samples", summary="Stored samples, paged (JSON or CSV)",
            response_model=SamplePage, responses={200: {"content": {"text/csv": {"schema": {"type": "string"}}}}})
def get_samples(channel_id: ChannelPath, ctx: Ctx, who: Who, limit: Limit = 100, cursor: str | None = None,
                format: Annotated[str, Query(pattern="^(json|csv)$")] = "json") -> SamplePage | Response:
    who.require_channel(channel_id, "technician")
    with ctx.work.unit(write=False) as unit:
        page = samples.export(unit.repo, channel_id, cursor=cursor, limit=limit)
    if format == "json":
        return SamplePage.model_validate(page, from_attributes=True)
    buf = io.StringIO()
    writer = TextSafeWriter(buf, CSV_FIELDS)
    writer.writerow(CSV_FIELDS)
    for it in page.items:
        x = it["x"]
        writer.writerow([it["seq"], it["t"].isoformat(), it["received_at"].isoformat(), it["source"] or "",
                         "" if it["source_seq"] is None else it["source_seq"],
                         x[0] if len(x) == 1 else ";".join(repr(v) for v in x), repr(it["y"]),
                         "" if it["residual"] is None else repr(it["residual"]),
                         "" if it["drift_statistic"] is None else repr(it["drift_statistic"]),
                         "true" if it["accepted"] else "false", it["reason"] or "", it["reference"] or ""])
    headers = {"X-Next-Cursor": page.next_cursor} if page.next_cursor else {}
    return Response(buf.getvalue(), media_type="text/csv; charset=utf-8", headers=headers)
