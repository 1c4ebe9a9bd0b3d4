"""Webhook schemas, and their answers."""

from __future__ import annotations

from datetime import datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from ...webhooks import KINDS
from .common import Answer, Page

EVENTS = "event kinds to deliver, among: " + ", ".join(KINDS)


class WebhookCreate(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"url": "http://10.20.0.5:8080/curvekeeper", "events": ["drift_alarm", "calibration"],
         "secret": "k7PqX2vN9wLr4TzB8mYc"}]})

    url: str = Field(min_length=8, max_length=2048, description="http:// or https:// URL; link-local and "
                     "cloud-metadata addresses are refused unless CURVEKEEPER_WEBHOOK_ALLOW_LINK_LOCAL is set")
    events: list[str] = Field(min_length=1, max_length=64, description=EVENTS)
    secret: str = Field(min_length=16, max_length=256, pattern=r"^[!-~]+$",
                        description="key of the HMAC-SHA256 signature of each body; kept as given by the "
                                    "service (it signs with it), shown this once")


class WebhookPublic(Answer):
    """A webhook as lists show it: never its secret."""

    id: str
    url: str
    events: list[str] = Field(description=EVENTS)
    created_at: datetime


class WebhookCreated(WebhookPublic):
    secret: str = Field(description="the signing secret: shown this once")


class WebhookPage(Page[WebhookPublic]):
    """Webhooks by id."""


class DeliveryPublic(Answer):
    """One event owed to one webhook (the outbox)."""

    id: int = Field(description="the delivery id (also the X-Curvekeeper-Delivery header and the body's delivery_id)")
    event_id: int | None = Field(description="the event delivered; null for a test send")
    state: Literal["pending", "delivered", "dead"]
    attempts: int = Field(description="attempts made so far")
    next_attempt_at: datetime | None = Field(description="when a pending delivery is tried next; null otherwise")
    last_status: int | None = Field(description="HTTP status of the last answer; null: none (no answer yet)")
    last_error: str | None
    created_at: datetime
    delivered_at: datetime | None


class DeliveryPage(Page[DeliveryPublic]):
    """A webhook's deliveries, oldest first."""
