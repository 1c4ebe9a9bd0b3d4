"""Liveness, readiness and metrics."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Header, Response

from ...errors import NotReady, StoreBusy
from ..deps import Ctx, check_rate, lookup_key
from ..schemas.common import error_responses
from ..schemas.health import Liveness, Readiness

router = APIRouter(tags=["health"])


# on the event loop itself, never behind the thread pool: it answers while work is queued there
@router.get("/healthz", summary="Liveness", response_model=Liveness)
async def healthz() -> Liveness:
    return Liveness()


@router.get("/readyz", summary="Readiness: the compiled kernels are built and the store answers",
            response_model=Readiness, responses=error_responses(503))
def readyz(ctx: Ctx) -> Readiness:
    kernels = ctx.kernels
    if not kernels.ready:
        if kernels.state == "failed":
            raise NotReady("building the compiled kernels failed; see the service log",
                           {"reason": "kernels_failed", "error": kernels.error})
        raise NotReady("the compiled kernels are still being built", {"reason": "kernels_building"})
    try:
        with ctx.store.transaction(write=False) as repo:
            repo.ping()
    except StoreBusy:
        raise
    except Exception as exc:  # any failure to reach the store means "not ready"
        raise StoreBusy("the store is not reachable", {"reason": "store_unreachable"}) from exc
    return Readiness()


@router.get("/metrics", summary="Prometheus metrics", response_class=Response,
            responses={200: {"content": {"text/plain": {}}}, **error_responses(401, 403, 503)})
def metrics(ctx: Ctx, authorization: Annotated[str | None, Header()] = None) -> Response:
    if not ctx.settings.metrics_public:
        who = lookup_key(ctx, authorization)
        who.require("technician")
        check_rate(ctx, who)
    return Response(ctx.metrics.render(), media_type="text/plain; version=0.0.4; charset=utf-8")
