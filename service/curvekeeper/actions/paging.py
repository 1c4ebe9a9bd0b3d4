"""Cursor paging: ``{"items": [...], "next_cursor": "..." or null}``."""

from __future__ import annotations

import base64
from dataclasses import dataclass
from typing import Any

from ..errors import InvalidRequest


@dataclass
class Page:
    items: list[Any]
    next_cursor: str | None


def encode_cursor(value: int | str) -> str:
    return base64.urlsafe_b64encode(f"v1:{value}".encode()).decode().rstrip("=")


def decode_cursor(cursor: str | None) -> int | None:
    if cursor is None:
        return None
    raw = decode_text_cursor(cursor) or ""
    try:
        return int(raw)
    except ValueError:
        raise InvalidRequest("cursor is not valid; use next_cursor from the previous page",
                             details={"field": "cursor"}) from None


def decode_text_cursor(cursor: str | None) -> str | None:
    if cursor is None:
        return None
    try:
        text = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4)).decode()
    except (ValueError, UnicodeDecodeError):
        text = ""
    if not text.startswith("v1:") or len(cursor) > 200:
        raise InvalidRequest("cursor is not valid; use next_cursor from the previous page",
                             details={"field": "cursor"})
    return text[3:]
