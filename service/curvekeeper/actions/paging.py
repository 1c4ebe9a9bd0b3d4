"""Cursor paging: ``{"items": [...], "next_cursor": "..." or null}``."""

from __future__ import annotations

import base64
import contextlib
import re
from dataclasses import dataclass
from typing import Any

from ..errors import InvalidRequest


@dataclass
class Page:
    items: list[Any]
    next_cursor: str | None


def encode_cursor(value: int | str) -> str:
    return base64.urlsafe_b64encode(f"v1:{value}".encode()).decode().rstrip("=")


_BAD = "cursor is not valid; use next_cursor from the previous page"
#: what an id cursor holds: a row number the store's 64-bit integers can take
_NUMBER = re.compile(r"[0-9]{1,18}")
#: what a text cursor holds: a key id, printable ASCII only (the store cannot take NUL)
_TEXT = re.compile(r"[!-~]{1,128}")


def decode_cursor(cursor: str | None) -> int | None:
    """The row number after which the next page starts; ``InvalidRequest`` for anything
    ``encode_cursor`` did not make."""
    if cursor is None:
        return None
    raw = decode_text_cursor(cursor) or ""
    if not _NUMBER.fullmatch(raw):
        raise InvalidRequest(_BAD, details={"field": "cursor"})
    return int(raw)


def decode_text_cursor(cursor: str | None) -> str | None:
    if cursor is None:
        return None
    text = ""
    if len(cursor) <= 200:
        with contextlib.suppress(ValueError):  # not base64, or not UTF-8 (a ValueError too)
            text = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4)).decode()
    if not text.startswith("v1:") or not _TEXT.fullmatch(text[3:]):
        raise InvalidRequest(_BAD, details={"field": "cursor"})
    return text[3:]
