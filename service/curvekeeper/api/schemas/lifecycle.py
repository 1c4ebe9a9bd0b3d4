"""Lifecycle requests: acknowledge a drift alarm, take a channel out of service and back,
archive it and unarchive it. Each answers the channel (``ChannelPublic``)."""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

from ...channel_config import Plain
from .channels import ServiceState

#: why, for the audit trail: one line of plain text with something in it besides spaces
Note = Annotated[Plain, Field(min_length=1, max_length=1000, pattern=r"\S",
                              examples=["probe cleaned and checked against the reference thermometer"])]


class AcknowledgeIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"note": "door left open during loading; readings back to normal"}]})

    note: Note


class ServiceIn(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"state": "out_of_service", "note": "probe sent for repair"}]})

    state: ServiceState
    note: Note


class ArchiveIn(BaseModel):
    """Why the channel is archived or unarchived (optional; kept in its event)."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"note": "probe removed with the old freezer"}, {}]})

    note: Note | None = None
