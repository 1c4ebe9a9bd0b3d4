"""Liveness, readiness and metrics."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Header, Response

from ...errors import StoreBusy
from ..deps import Ctx, check_rate, lookup_key
from ..schemas.common import error_responses

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="Liveness")
def healthz() -> dict[str, str]:
    return {"status": "ok"}


@router.get("/readyz", summary="Readiness: the store answers", responses=error_responses(503))
def readyz(ctx: Ctx) -> dict[str, str]:
    try:
        with ctx.store.transaction(write=False) as repo:
            repo.ping()
    except StoreBusy:
        raise
    except Exception as exc:  # any failure to reach the store means "not ready"
        raise StoreBusy("the store is not reachable") from exc
    return {"status": "ready"}


@router.get("/metrics", summary="Prometheus metrics", response_class=Response,
            responses={200: {"content": {"text/plain": {}}}, **error_responses(401, 403, 503)})
def metrics(ctx: Ctx, authorization: Annotated[str | None, Header()] = None) -> Response:
    if not ctx.settings.metrics_public:
        who = lookup_key(ctx, authorization)
        who.require("technician")
        check_rate(ctx, who)
    return Response(ctx.metrics.render(), media_type="text/plain; version=0.0.4; charset=utf-8")
