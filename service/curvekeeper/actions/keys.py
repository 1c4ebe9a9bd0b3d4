"""API key management (admin)."""

from __future__ import annotations

from typing import Any

from .. import auth
from ..errors import InvalidRequest, KeyNotFound
from ..store import Repository
from ..store.tables import ApiKey
from .paging import Page, decode_text_cursor, encode_cursor


def _item(k: ApiKey) -> dict[str, Any]:
    return {"id": k.id, "role": k.role, "prefixes": k.prefixes, "label": k.label,
            "created_at": k.created_at, "revoked_at": k.revoked_at}


def create(repo: Repository, *, role: str, prefixes: list[str], label: str | None, key_id: str | None
           ) -> dict[str, Any]:
    if prefixes and role != "device":
        raise InvalidRequest("prefixes limit device keys only; a technician or admin key has no prefixes",
                             details={"field": "prefixes"})
    key, secret = auth.create_key(repo, role=role, prefixes=prefixes, label=label)
    repo.insert_events([{"channel_pk": None, "kind": "key_created", "key_id": key_id,
                         "details": {"id": key.id, "role": role, "prefixes": prefixes, "label": label}}])
    out = _item(key)
    out["secret"] = secret
    return out


def list_(repo: Repository, *, cursor: str | None, limit: int) -> Page:
    rows = repo.list_keys(after_id=decode_text_cursor(cursor), limit=limit + 1)
    return Page([_item(k) for k in rows[:limit]], encode_cursor(rows[limit - 1].id) if len(rows) > limit else None)


def revoke(repo: Repository, kid: str, key_id: str | None) -> dict[str, Any]:
    key = repo.get_key(kid)
    if key is None:
        raise KeyNotFound(f"no api key {kid!r}")
    if key.revoked_at is None:
        repo.revoke_key(key)
        repo.insert_events([{"channel_pk": None, "kind": "key_revoked", "key_id": key_id,
                             "details": {"id": kid}}])
    return _item(key)
