"""Samples over MQTT: a subscriber (``subscriber``) hands each message to the same ingest
the HTTP route runs (``ingest``), answers on the results topic, and acknowledges the
message to the broker only once its samples are committed."""

from __future__ import annotations

from .ingest import Reply, ingest_message
from .subscriber import Subscriber, Topics

__all__ = ["Reply", "Subscriber", "Topics", "ingest_message"]
