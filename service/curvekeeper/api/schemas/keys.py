"""API key schemas."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field

from .common import ChannelId, Label


class KeyCreate(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"role": "device", "prefixes": ["site-a."], "label": "gateway 3"}]})

    role: str = Field(pattern="^(admin|technician|device)$")
    prefixes: list[ChannelId] = Field(default_factory=list, max_length=64)
    label: Label | None = None
