"""API key management (admin)."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from .. import auth
from ..errors import InvalidRequest, KeyNotFound
from ..store import Repository
from ..store.tables import ApiKey
from .paging import Page, decode_text_cursor, encode_cursor


def _item(k: ApiKey) -> dict[str, Any]:
    return {"id": k.id, "role": k.role, "prefixes": k.prefixes, "label": k.label,
            "created_at": k.created_at, "revoked_at": k.revoked_at, "last_used_at": k.last_used_at}


def _store(repo: Repository, key: ApiKey, *, key_id: str | None, by: str | None, unless_taken: bool = False
           ) -> bool:
    """Store a new key and its ``key_created`` event: the one place both are written.
    ``key_id`` is the acting key (None when the service or the command line makes it);
    ``by`` says who else did. With ``unless_taken``, a key whose secret another process
    stored meanwhile is left alone and False returned."""
    if unless_taken:
        if not repo.insert_key_unless_taken(key):
            return False
    else:
        repo.insert_key(key)
    details: dict[str, Any] = {"id": key.id, "role": key.role, "prefixes": key.prefixes, "label": key.label}
    if by is not None:
        details["by"] = by
    repo.insert_events([{"channel_pk": None, "kind": "key_created", "key_id": key_id, "details": details}])
    return True


def create(repo: Repository, *, role: str, prefixes: list[str], label: str | None, key_id: str | None,
           by: str | None = None) -> dict[str, Any]:
    """A new key (POST /v1/keys, ``curvekeeper keys create``): its item and, once, its secret."""
    if prefixes and role != "device":
        raise InvalidRequest("prefixes limit device keys only; a technician or admin key has no prefixes",
                             details={"field": "prefixes"})
    key, secret = auth.new_key(role=role, prefixes=prefixes, label=label)
    _store(repo, key, key_id=key_id, by=by)
    out = _item(key)
    out["secret"] = secret
    return out


def first_admin_key(repo: Repository) -> dict[str, Any] | None:
    """On a store without any key, a new admin key (with its secret, shown once); else None."""
    if repo.count_rows(ApiKey):
        return None
    return create(repo, role="admin", prefixes=[], label="first admin key", key_id=None, by="first start")


def ensure_admin_key(repo: Repository, secret: str) -> ApiKey:
    """Make sure an admin key with this secret exists (CURVEKEEPER_ADMIN_KEY at start-up);
    raises ValueError when the secret belongs to a revoked or non-admin key."""
    key = repo.key_by_hash(auth.hash_secret(secret))
    if key is not None and key.revoked_at is None and key.role == "admin":
        return key
    if key is not None:
        raise ValueError("CURVEKEEPER_ADMIN_KEY matches a revoked or non-admin key; choose another secret")
    new, _ = auth.new_key(role="admin", prefixes=[], label="admin key from CURVEKEEPER_ADMIN_KEY", secret=secret)
    if _store(repo, new, key_id=None, by="CURVEKEEPER_ADMIN_KEY at start-up", unless_taken=True):
        return new
    # another process made it between our look-up and our insert
    return ensure_admin_key(repo, secret)


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


def record_use(repo: Repository, key_id: str, at: datetime) -> None:
    """Note that the key was used at ``at`` (the caller throttles how often: ``KeyUse``)."""
    repo.key_used(key_id, at)
