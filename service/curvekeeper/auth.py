"""API keys and roles: admin > technician > device.

Secrets are random (192 bits), shown once, stored only as their SHA-256 (a fast
hash suits long random secrets; there is nothing to brute-force), and looked up
by that hash, then compared with ``hmac.compare_digest``.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass, field

from .errors import Forbidden, Unauthorized
from .store import Repository
from .store.tables import ApiKey, utcnow

ROLES = {"device": 0, "technician": 1, "admin": 2}


@dataclass(frozen=True)
class Principal:
    key_id: str
    role: str
    prefixes: list[str] = field(default_factory=list)

    def require(self, role: str) -> None:
        if ROLES[self.role] < ROLES[role]:
            raise Forbidden(f"this needs a {role} key; the key used is a {self.role} key")

    def require_channel(self, channel_id: str, role: str = "device") -> None:
        """The role, and for device keys limited to prefixes, a matching channel id."""
        self.require(role)
        if self.role == "device" and self.prefixes and not any(channel_id.startswith(p) for p in self.prefixes):
            raise Forbidden(f"this device key may not use channel {channel_id!r}")


def hash_secret(secret: str) -> str:
    return hashlib.sha256(secret.encode()).hexdigest()


def new_secret() -> str:
    return "ck_" + secrets.token_urlsafe(24)


def new_key_id() -> str:
    return "k_" + secrets.token_hex(8)


def authenticate(repo: Repository, authorization: str | None) -> Principal:
    if not authorization:
        raise Unauthorized("missing Authorization: Bearer <api key>")
    scheme, _, secret = authorization.partition(" ")
    secret = secret.strip()
    if scheme.lower() != "bearer" or not secret or len(secret) > 512:
        raise Unauthorized("the Authorization header must be 'Bearer <api key>'")
    digest = hash_secret(secret)
    key = repo.key_by_hash(digest)
    if key is None or not hmac.compare_digest(key.secret_hash, digest) or key.revoked_at is not None:
        raise Unauthorized("unknown or revoked api key")
    return Principal(key.id, key.role, list(key.prefixes or []))


def new_key(*, role: str, prefixes: list[str], label: str | None, secret: str | None = None
            ) -> tuple[ApiKey, str]:
    """A new key row, not yet stored, and its secret (shown once)."""
    secret = secret or new_secret()
    return ApiKey(id=new_key_id(), secret_hash=hash_secret(secret), role=role, prefixes=prefixes,
                  label=label, created_at=utcnow()), secret
