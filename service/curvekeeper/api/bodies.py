"""Request bodies that hold long lists (samples, predict inputs, calibration points): their
items are counted before any model object is built, and neither parsing nor validating a
large one holds the event loop.

A large body is parsed in a worker thread one list item per ``json`` call
(``parse_counted``), stopping as soon as the list holds more items than allowed (413); and
validated in slices (``validate_body``). Both matter beyond the thread: ``json.loads`` and
pydantic hold the GIL for the whole of one call, so one call over a whole large body would
hold the loop's thread just the same. And the cyclic garbage collector is paused meanwhile
(``paused_gc``): the many objects such a body becomes set off full collections, each of
which holds the GIL, so every thread, in proportion to the size of the heap.
"""

from __future__ import annotations

import gc
import json
import re
from collections.abc import Callable, Coroutine, Iterator
from contextlib import contextmanager, suppress
from functools import lru_cache
from threading import Lock
from types import UnionType
from typing import Any, TypeVar, Union, get_args, get_origin

from fastapi.exceptions import RequestValidationError
from fastapi.routing import APIRoute
from pydantic import BaseModel, PlainValidator, TypeAdapter, ValidationError
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import Response

from ..config import Settings
from ..errors import PayloadTooLarge

M = TypeVar("M", bound=BaseModel)

#: most list items a body may hold to be validated on the event loop (more: in a worker thread)
INLINE_MAX_BODY_ITEMS = 1000
#: list items validated in one call (see ``validate_body``)
VALIDATE_SLICE = 500


def _as_parsed(value: Any) -> Any:
    return value


def unvalidated(model: type[BaseModel]) -> PlainValidator:
    """For ``Annotated[Any, Body(), unvalidated(Model)]``: a request body that FastAPI parses
    from JSON but leaves unvalidated (no model object is built), documented in the OpenAPI
    document as ``Model``: the route counts its items first (``checked_body``), so an
    oversized body is refused before paying for its validation."""
    return PlainValidator(_as_parsed, json_schema_input_type=model)


def count_items(raw: Any, key: str) -> int:
    """How many items the parsed body's list ``key`` holds (0 where it is not a list)."""
    items = raw.get(key) if isinstance(raw, dict) else None
    return len(items) if isinstance(items, list) else 0


def _body_error(exc: ValidationError, prefix: tuple[str | int, ...] = (), offset: int = 0) -> RequestValidationError:
    """The 422 FastAPI gives for a body (locations ``("body", ...)``); ``offset`` shifts the
    item index of errors found in a slice of the list ``prefix``."""
    errors = []
    for e in exc.errors(include_url=False):
        loc = tuple(e["loc"])
        if prefix and loc and isinstance(loc[0], int):
            loc = (*prefix, loc[0] + offset, *loc[1:])
        errors.append({**e, "loc": ("body", *loc)})
    return RequestValidationError(errors)


@lru_cache(maxsize=32)
def _adapter(annotation: Any) -> TypeAdapter[Any]:
    return TypeAdapter(annotation)


def validate_body(raw: Any, model: type[M], key: str | None = None) -> M:
    """``raw`` (parsed JSON) as ``model``; a ``ValidationError`` becomes the 422 FastAPI gives
    for a body. A long list ``key`` is validated ``VALIDATE_SLICE`` items per call: pydantic
    holds the GIL for the whole of one call, and between slices the event loop's thread runs."""
    items = raw.get(key) if key is not None and isinstance(raw, dict) else None
    if key is None or not isinstance(items, list) or len(items) <= VALIDATE_SLICE:
        try:
            return model.model_validate(raw)
        except ValidationError as exc:
            raise _body_error(exc) from None
    try:
        head = model.model_validate({**raw, key: items[:VALIDATE_SLICE]})
    except ValidationError as exc:
        raise _body_error(exc) from None
    annotation = model.model_fields[key].annotation
    kinds = get_args(annotation) if get_origin(annotation) in (Union, UnionType) else (annotation,)
    # the member of a union the first slice was taken as (predict's x: numbers, or lists of them)
    adapter = next(a for a in map(_adapter, kinds) if _fits(a, items[:VALIDATE_SLICE]))
    out = list(getattr(head, key))
    for off in range(VALIDATE_SLICE, len(items), VALIDATE_SLICE):
        try:
            out.extend(adapter.validate_python(items[off:off + VALIDATE_SLICE]))
        except ValidationError as exc:
            raise _body_error(exc, (key,), off) from None
    return head.model_copy(update={key: out})


def _fits(adapter: TypeAdapter[Any], value: Any) -> bool:
    try:
        adapter.validate_python(value)
    except ValidationError:
        return False
    return True


def check_items(n: int, cap: int, noun: str, setting: str) -> None:
    """413 (payload_too_large) when a body holds more than ``cap`` items."""
    if n > cap:
        raise PayloadTooLarge(f"{n} {noun} in one request; at most {cap} are accepted", details={setting: cap})


async def checked_body(raw: Any, model: type[M], *, key: str, cap: int, noun: str, setting: str) -> M:
    """The body's item count checked against ``cap`` before any validation, then the body
    validated: in a worker thread when it is large (validation costs microseconds per item)."""
    n = count_items(raw, key)
    check_items(n, cap, noun, setting)
    if n <= INLINE_MAX_BODY_ITEMS:
        return validate_body(raw, model, key)
    return await run_in_threadpool(_validate_paused, raw, model, key)


def _validate_paused(raw: Any, model: type[M], key: str) -> M:
    with paused_gc():
        return validate_body(raw, model, key)


_gc_lock = Lock()
_gc_pausers = 0
_gc_was_enabled = False


@contextmanager
def paused_gc() -> Iterator[None]:
    """The cyclic garbage collector off while the block runs (in any thread; it comes back
    on when the last such block ends, if it was on before the first)."""
    global _gc_pausers, _gc_was_enabled
    with _gc_lock:
        if _gc_pausers == 0:
            _gc_was_enabled = gc.isenabled()
            gc.disable()
        _gc_pausers += 1
    try:
        yield
    finally:
        with _gc_lock:
            _gc_pausers -= 1
            if _gc_pausers == 0 and _gc_was_enabled:
                gc.enable()


#: bodies up to this size (bytes) are parsed by FastAPI on the event loop, in one call
PARSE_INLINE_BYTES = 64 * 1024
_WS = re.compile(r"[ \t\n\r]*")
_DECODER = json.JSONDecoder()


class _Unparsed(Exception):
    """Not a JSON object this parser follows: FastAPI parses it (and says what is wrong)."""


def parse_counted(body: bytes, key: str, cap: int, setting: str, noun: str) -> Any:
    """The JSON object in ``body``, its list ``key`` decoded one item per call; 413 as soon
    as that list holds more than ``cap`` items. Raises ``_Unparsed`` for anything else
    than a well-formed JSON object (FastAPI's own parse then gives its error)."""
    try:
        text = body.decode("utf-8")
        with paused_gc():
            return _object(text, key, cap, setting, noun)
    except (UnicodeDecodeError, json.JSONDecodeError, IndexError) as exc:
        raise _Unparsed() from exc


def _ws(text: str, i: int) -> int:
    m = _WS.match(text, i)
    return m.end() if m else i


def _expect(text: str, i: int, char: str) -> int:
    if not text.startswith(char, i):
        raise _Unparsed()
    return _ws(text, i + 1)


def _comma(text: str, i: int, end: str) -> int:
    i = _expect(text, i, ",")
    if text.startswith(end, i):  # a trailing comma is not JSON
        raise _Unparsed()
    return i


def _object(text: str, key: str, cap: int, setting: str, noun: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    i = _expect(text, _ws(text, 0), "{")
    while not text.startswith("}", i):
        name, i = _DECODER.raw_decode(text, i)
        if not isinstance(name, str):
            raise _Unparsed()
        i = _expect(text, _ws(text, i), ":")
        if name == key and text.startswith("[", i):
            items: list[Any] = []
            i = _ws(text, i + 1)
            while not text.startswith("]", i):
                item, i = _DECODER.raw_decode(text, i)
                items.append(item)
                check_items(len(items), cap, noun, setting)
                i = _ws(text, i)
                if not text.startswith("]", i):
                    i = _comma(text, i, "]")
            out[name], i = items, _ws(text, i + 1)
        else:
            out[name], i = _DECODER.raw_decode(text, i)
            i = _ws(text, i)
        if not text.startswith("}", i):
            i = _comma(text, i, "}")
    if _ws(text, i + 1) != len(text):
        raise _Unparsed()
    return out


def counted(key: str, cap: Callable[[Settings], int], setting: str, noun: str
            ) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Marks a route whose body's list ``key`` may hold at most ``cap(settings)`` items, for
    ``CountedRoute`` (put it below the router's decorator)."""
    def mark(endpoint: Callable[..., Any]) -> Callable[..., Any]:
        endpoint.counted = (key, cap, setting, noun)  # type: ignore[attr-defined]
        return endpoint
    return mark


class CountedRoute(APIRoute):
    """A route whose large JSON body (over ``PARSE_INLINE_BYTES``) is parsed by
    ``parse_counted`` in a worker thread before FastAPI sees it (FastAPI then takes the
    parsed value as it is): a body with too many items is refused before it is even parsed
    whole."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()
        spec = getattr(self.endpoint, "counted", None)
        if spec is None:
            return handler
        key, cap, setting, noun = spec

        async def parse_first(request: Request) -> Response:
            body = await request.body()
            if len(body) > PARSE_INLINE_BYTES:
                limit = cap(request.app.state.ctx.settings)
                # Starlette's Request.json() returns _json when set: FastAPI takes this parse
                with suppress(_Unparsed):
                    request._json = await run_in_threadpool(parse_counted, body, key, limit, setting, noun)
            return await handler(request)

        return parse_first
