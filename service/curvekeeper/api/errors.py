"""One place that turns errors into the contract's body:
``{"error": {"code": ..., "message": ..., "details": ...}}``."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException
from starlette.routing import Match

from ..core import CoreError, StateError
from ..errors import (
    Conflict,
    Forbidden,
    InvalidRequest,
    NotCalibrated,
    NotFound,
    NotReady,
    PayloadTooLarge,
    ServiceError,
    StateDamaged,
    StoreBusy,
    Unauthorized,
    validation_details,
    validation_message,
)
from .deps import lookup_key

log = logging.getLogger("curvekeeper.api")

HTTP_CODES = {404: "not_found", 405: "method_not_allowed", 413: "payload_too_large", 401: "unauthorized",
              403: "forbidden", 400: "bad_request", 429: "rate_limited"}


#: the HTTP status of each domain error class (the first match in this order wins);
#: anything else, StateDamaged included, is the server's fault: 500
STATUS: tuple[tuple[type[ServiceError], int], ...] = (
    (Unauthorized, 401), (Forbidden, 403), (NotFound, 404), (NotCalibrated, 409), (Conflict, 409),
    (PayloadTooLarge, 413), (InvalidRequest, 422), (StoreBusy, 503), (NotReady, 503), (StateDamaged, 500),
)


def status_of(exc: ServiceError) -> int:
    """The HTTP status a domain error answers with."""
    return next((status for cls, status in STATUS if isinstance(exc, cls)), 500)


def error_body(code: str, message: str, details: Any = None) -> dict[str, Any]:
    return {"error": {"code": code, "message": message, "details": details}}


def error_response(status: int, code: str, message: str, details: Any = None,
                   headers: dict[str, str] | None = None) -> JSONResponse:
    return JSONResponse(error_body(code, message, details), status_code=status, headers=headers)


def _leaf_routes(routes: Any) -> list[Any]:
    """The app's routes, with included routers opened up."""
    out = []
    for route in routes:
        inner = getattr(getattr(route, "original_router", None), "routes", None)
        out.extend(_leaf_routes(inner) if inner is not None else [route])
    return out


def install(app: FastAPI) -> None:
    @app.exception_handler(ServiceError)
    async def _service(_: Request, exc: ServiceError) -> JSONResponse:
        headers = {"Retry-After": str(exc.retry_after)} if isinstance(exc, StoreBusy | NotReady) else None
        if isinstance(exc, StoreBusy):
            # the database's own words ("database or disk is full"), not only a class name
            cause = getattr(exc.__cause__, "orig", None) or exc.__cause__ or exc.message
            reason = exc.details.get("reason") if isinstance(exc.details, dict) else None
            log.warning("store unavailable (%s): %s", reason, cause)
        status = status_of(exc)
        if status == 500:
            log.error("%s: %s (%s)", exc.code, exc.message, exc.details)
        return error_response(status, exc.code, exc.message, exc.details, headers)

    @app.exception_handler(CoreError)
    async def _core(_: Request, exc: CoreError) -> JSONResponse:
        if isinstance(exc, StateError):
            # a state the core cannot restore came from the store, not from the client
            log.error("stored state cannot be restored: %s", exc.message)
            return error_response(500, StateDamaged.code, "a stored state cannot be restored; "
                                  "it has been logged", {"field": exc.field})
        return error_response(422, exc.code, exc.message, {"field": exc.field})

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> JSONResponse:
        # a caller without a valid key learns nothing about the body: 401 comes first
        if request.url.path.startswith("/v1/"):
            try:
                await run_in_threadpool(lookup_key, request.app.state.ctx, request.headers.get("authorization"))
            except ServiceError as denied:
                return error_response(status_of(denied), denied.code, denied.message, denied.details)
        errors = validation_details(exc.errors())
        if any(e["type"] == "json_invalid" for e in errors):
            return error_response(400, "malformed_json", "the request body is not valid JSON", errors)
        return error_response(422, "validation_error", validation_message(errors), errors)

    @app.exception_handler(HTTPException)
    async def _http(request: Request, exc: HTTPException) -> JSONResponse:
        code = HTTP_CODES.get(exc.status_code, "http_error")
        message = exc.detail if isinstance(exc.detail, str) else code.replace("_", " ")
        headers = dict(getattr(exc, "headers", None) or {})
        if exc.status_code == 405:
            # every method any route of this path answers, not just the first route's
            probe = {**request.scope, "method": "__none__"}
            allowed = {m for route in _leaf_routes(request.app.router.routes)
                       if route.matches(probe)[0] != Match.NONE for m in (getattr(route, "methods", None) or ())}
            headers["Allow"] = ", ".join(sorted(allowed))
        return error_response(exc.status_code, code, message, None, headers or None)

    @app.exception_handler(Exception)
    async def _unexpected(_: Request, exc: Exception) -> JSONResponse:
        log.exception("unexpected error")
        return error_response(500, "internal_error", "an unexpected error occurred; it has been logged")
