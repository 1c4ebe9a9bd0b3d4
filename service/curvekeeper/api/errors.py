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

from ..core import CoreError
from ..errors import ServiceError, StoreBusy, validation_details, validation_message
from .deps import lookup_key

log = logging.getLogger("curvekeeper.api")

HTTP_CODES = {404: "not_found", 405: "method_not_allowed", 413: "payload_too_large", 401: "unauthorized",
              403: "forbidden", 400: "bad_request", 429: "rate_limited"}


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
        headers = {"Retry-After": str(exc.retry_after)} if isinstance(exc, StoreBusy) else None
        if isinstance(exc, StoreBusy):
            log.warning("store busy: %s", exc.details)
        return error_response(exc.status, exc.code, exc.message, exc.details, headers)

    @app.exception_handler(CoreError)
    async def _core(_: Request, exc: CoreError) -> JSONResponse:
        return error_response(422, exc.code, exc.message, {"field": exc.field})

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> JSONResponse:
        # a caller without a valid key learns nothing about the body: 401 comes first
        if request.url.path.startswith("/v1/"):
            try:
                await run_in_threadpool(lookup_key, request.app.state.ctx, request.headers.get("authorization"))
            except ServiceError as denied:
                return error_response(denied.status, denied.code, denied.message, denied.details)
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
