"""The body of a delivery and its signature: ``X-Curvekeeper-Signature: sha256=<hex>``,
the HMAC-SHA256 (RFC 2104, FIPS 180-4) of the raw body bytes keyed with the webhook's secret."""

from __future__ import annotations

import hashlib
import hmac
import json
from typing import Any

SIGNATURE_HEADER = "X-Curvekeeper-Signature"
DELIVERY_HEADER = "X-Curvekeeper-Delivery"


def body(delivery_id: int, event: dict[str, Any]) -> bytes:
    """The JSON body POSTed: ``{"delivery_id", "event"}`` (UTF-8 bytes, the signed ones)."""
    return json.dumps({"delivery_id": delivery_id, "event": event}, separators=(",", ":"),
                      default=str).encode()


def sign(secret: str, raw: bytes) -> str:
    """The signature header's value for ``raw`` (the exact bytes sent)."""
    return "sha256=" + hmac.new(secret.encode(), raw, hashlib.sha256).hexdigest()


def verify(secret: str, raw: bytes, header: str) -> bool:
    """Whether ``header`` is the signature of ``raw`` (a receiver's check; constant time)."""
    return hmac.compare_digest(sign(secret, raw), header)
