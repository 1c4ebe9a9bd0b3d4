"""Channel events: drift changes, guards, calibrations, snapshots, rollbacks, settings."""

from __future__ import annotations

from ..store import Repository
from .channels import load
from .paging import Page, decode_cursor, encode_cursor


def list_(repo: Repository, channel_id: str, *, kind: str | None, cursor: str | None, limit: int) -> Page:
    ch, _ = load(repo, channel_id)
    rows = repo.list_events(ch.pk, kind=kind, after_pk=decode_cursor(cursor), limit=limit + 1)
    items = [{"id": e.pk, "kind": e.kind, "at": e.at, "version": e.version, "key_id": e.key_id,
              "details": e.details} for e in rows[:limit]]
    return Page(items, encode_cursor(rows[limit - 1].pk) if len(rows) > limit else None)
