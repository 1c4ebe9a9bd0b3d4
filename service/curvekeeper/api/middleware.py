"""ASGI middleware: request body size limit, and request metrics."""

from __future__ import annotations

import json
import time
from typing import Any

from starlette.exceptions import HTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from ..metrics import UNMATCHED, Metrics
from .errors import error_body


class BodyLimit:
    """Answers 413 with the error body when a request body exceeds ``max_bytes``."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        for name, value in scope.get("headers", []):
            if name == b"content-length":
                try:
                    too_big = int(value) > self.max_bytes
                except ValueError:
                    too_big = False
                if too_big:
                    await self._reject(send)
                    return
        seen = 0
        started = False

        async def limited() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > self.max_bytes:
                    # an HTTPException passes through FastAPI's body reader to the error handler
                    raise HTTPException(413, f"the request body is larger than {self.max_bytes} bytes")
            return message

        async def tracking_send(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, limited, tracking_send)
        except HTTPException:
            if not started:
                await self._reject(send)

    async def _reject(self, send: Send) -> None:
        body = json.dumps(error_body("payload_too_large",
                                     f"the request body is larger than {self.max_bytes} bytes")).encode()
        await send({"type": "http.response.start", "status": 413,
                    "headers": [(b"content-type", b"application/json"),
                                (b"content-length", str(len(body)).encode())]})
        await send({"type": "http.response.body", "body": body})


class RequestMetrics:
    """Counts requests and their latency by route template and status."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = {"code": 500}

        async def send_status(message: Message) -> None:
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_status)
        finally:
            # the route's template, never the path as sent: label values must stay few
            route: Any = scope.get("route")
            path = getattr(route, "path", None)
            if not isinstance(path, str):
                path = UNMATCHED
            self.metrics.observe_request(scope.get("method", ""), path, status["code"],
                                         time.perf_counter() - start)


API_CSP = "default-src 'none'; frame-ancestors 'none'"
# the interactive API page (api/docs.py) loads its script and style from this service
# and starts with an inline script; nothing else may load, and no page may frame it
DOCS_CSP = ("default-src 'none'; script-src 'self' 'unsafe-inline'; style-src 'self' 'unsafe-inline'; "
            "img-src 'self' data:; connect-src 'self'; "
            "frame-ancestors 'none'; base-uri 'none'; form-action 'none'")
# the technician's pages under /ui/: scripts and styles from this service only, no inline
# script, no eval; styles may also be set inline, because the plotting library positions
# its elements with style attributes; no form posts anywhere (the scripts send the key)
UI_CSP = ("default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; img-src 'self' data:; "
          "font-src 'self'; connect-src 'self'; frame-ancestors 'none'; base-uri 'none'; form-action 'none'")


class SecurityHeaders:
    """Headers on every answer: no MIME sniffing, no framing, no referrer, no caching of
    API answers, and a content security policy (strict for JSON, the docs' for their HTML,
    the technician pages' own for ``/ui/``)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", []))
                names = {k.lower() for k, _ in headers}
                html = any(k.lower() == b"content-type" and v.startswith(b"text/html") for k, v in headers)
                path = scope.get("path", "")
                csp = UI_CSP if path == "/ui" or path.startswith("/ui/") else DOCS_CSP if html else API_CSP
                extra = [(b"x-content-type-options", b"nosniff"), (b"x-frame-options", b"DENY"),
                         (b"referrer-policy", b"no-referrer"), (b"content-security-policy", csp.encode())]
                if path.startswith("/v1/"):
                    extra.append((b"cache-control", b"no-store"))
                headers += [(k, v) for k, v in extra if k not in names]
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, with_headers)
