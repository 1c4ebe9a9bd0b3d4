"""API key schemas, and their answers."""

from __future__ import annotations

from datetime import datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from .common import Answer, ChannelId, Label, Page


class KeyCreate(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"role": "device", "prefixes": ["site-a."], "label": "gateway 3"}]})

    role: str = Field(pattern="^(admin|technician|device)$")
    prefixes: list[ChannelId] = Field(default_factory=list, max_length=64)
    label: Label | None = None


class KeyPublic(Answer):
    """An API key as lists show it: never its secret."""

    id: str
    role: Literal["admin", "technician", "device"]
    prefixes: list[str] = Field(description="channel-id prefixes a device key is limited to; empty: all")
    label: str | None
    created_at: datetime
    revoked_at: datetime | None = Field(description="null while the key is valid")
    last_used_at: datetime | None = Field(description="its last authenticated use, recorded at most once a minute "
                                                      "(so up to a minute early); null: not used yet")


class KeyCreated(KeyPublic):
    secret: str = Field(description="the key's secret: shown this once, stored only hashed")


class KeyPage(Page[KeyPublic]):
    """API keys by id."""
