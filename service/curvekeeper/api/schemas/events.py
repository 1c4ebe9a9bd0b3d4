"""Event and audit answers."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import Field

from .common import Answer, Page

KIND = ("channel_created, settings_changed, calibration, snapshot, rollback, acknowledged, service_changed, "
        "guard, drift_warning, drift_alarm, drift_ok, ok, out_of_tolerance, key_created, key_revoked")


class EventPublic(Answer):
    """Something that happened to a channel."""

    id: int
    kind: str = Field(description=KIND)
    at: datetime
    version: int | None = Field(description="the channel's state version it happened at")
    key_id: str | None = Field(description="the key that caused it; null when the service did")
    details: dict[str, Any] = Field(description="what the kind carries (sample_seq, snapshot, label, ...)")


class EventPage(Page[EventPublic]):
    """A channel's events, oldest first."""


class AuditEntry(Answer):
    """An event of any channel, or of the keys, with a line for a person; never a secret."""

    id: int
    kind: str = Field(description=KIND)
    channel: str | None = Field(description="the channel's id; null for key events")
    key_id: str | None = Field(description="the key that caused it; null when the service did")
    at: datetime
    version: int | None = Field(description="the channel's state version it happened at; null for key events")
    summary: str = Field(description="what happened, in a few words")
    details: dict[str, Any] = Field(description="what the kind carries; secrets are left out")


class AuditPage(Page[AuditEntry]):
    """The audit trail, oldest first."""
