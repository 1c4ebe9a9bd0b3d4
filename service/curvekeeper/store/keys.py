"""The SQL of API keys: a part of ``Repository``."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime

from sqlalchemy import select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .tables import ApiKey, utcnow


class KeyQueries:
    session: Session

    # keys -------------------------------------------------------------------------------
    def insert_key(self, key: ApiKey) -> None:
        self.session.add(key)
        self.session.flush()

    def insert_key_unless_taken(self, key: ApiKey) -> bool:
        """Insert a key in a savepoint; False (and nothing changed) when its secret is
        taken already, e.g. by another process at the same moment."""
        try:
            with self.session.begin_nested():
                self.session.add(key)
        except IntegrityError:
            return False
        return True

    def key_by_hash(self, secret_hash: str) -> ApiKey | None:
        return self.session.scalars(select(ApiKey).where(ApiKey.secret_hash == secret_hash)).one_or_none()

    def get_key(self, key_id: str) -> ApiKey | None:
        return self.session.get(ApiKey, key_id)

    def list_keys(self, *, after_id: str | None, limit: int) -> Sequence[ApiKey]:
        stmt = select(ApiKey).order_by(ApiKey.id).limit(limit)
        if after_id is not None:
            stmt = stmt.where(ApiKey.id > after_id)
        return self.session.scalars(stmt).all()

    def key_used(self, key_id: str, at: datetime) -> None:
        """Record a key's use at ``at`` (one UPDATE; never moves the time back)."""
        self.session.execute(update(ApiKey).where(ApiKey.id == key_id)
                             .where((ApiKey.last_used_at.is_(None)) | (ApiKey.last_used_at < at))
                             .values(last_used_at=at))

    def revoke_key(self, key: ApiKey) -> None:
        key.revoked_at = utcnow()
        self.session.flush()
