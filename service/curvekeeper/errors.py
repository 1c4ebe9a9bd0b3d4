"""Domain errors raised below the HTTP layer; ``curvekeeper.api.errors`` maps them to the
contract's error body. Core errors (``curvekeeper.core.errors``) are mapped there too.

    ServiceError
    ├── Unauthorized      401 missing, unknown or revoked key
    ├── Forbidden         403 role or channel prefix not allowed
    ├── NotFound          404 (ChannelNotFound, SnapshotNotFound, KeyNotFound)
    ├── Conflict          409 (ChannelExists, ImmutableField)
    ├── PayloadTooLarge   413 too many samples, points or bytes
    ├── InvalidRequest    422 a value the schema cannot catch
    │   └── InvalidConfig     a merged channel configuration the declaration refuses
    └── StoreBusy         503 the store is locked or unreachable (Retry-After)
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any


class ServiceError(Exception):
    status = 500
    code = "internal_error"

    def __init__(self, message: str, details: Any = None) -> None:
        super().__init__(message)
        self.message = message
        self.details = details


class Unauthorized(ServiceError):
    status = 401
    code = "unauthorized"


class Forbidden(ServiceError):
    status = 403
    code = "forbidden"


class NotFound(ServiceError):
    status = 404
    code = "not_found"


class ChannelNotFound(NotFound):
    code = "channel_not_found"


class SnapshotNotFound(NotFound):
    code = "snapshot_not_found"


class KeyNotFound(NotFound):
    code = "key_not_found"


class Conflict(ServiceError):
    status = 409
    code = "conflict"


class ChannelExists(Conflict):
    code = "channel_exists"


class ImmutableField(Conflict):
    code = "immutable_field"


class PayloadTooLarge(ServiceError):
    status = 413
    code = "payload_too_large"


class InvalidRequest(ServiceError):
    status = 422
    code = "invalid_request"


class InvalidConfig(InvalidRequest):
    """A channel configuration refused by its declaration below the request schema (a PATCH
    merged into the stored settings); the same body as a refused request."""

    code = "validation_error"

    @classmethod
    def from_errors(cls, errors: Iterable[Mapping[str, Any]]) -> InvalidConfig:
        """From pydantic's ``errors()`` of the configuration (locations within the body)."""
        details = validation_details(errors, prefix=("body",))
        return cls(validation_message(details), details)


def field_path(loc: Sequence[Any]) -> str:
    """A location as the field's name: ``inputs[0].min``, ``drift.tolerance`` (``body`` left out)."""
    out = ""
    for part in loc:
        if part == "body" and not out:
            continue
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


def validation_details(errors: Iterable[Mapping[str, Any]], prefix: tuple[str, ...] = ()) -> list[dict[str, Any]]:
    """Validation errors as the error body's details: each ``loc`` (strings), ``msg`` and ``type``."""
    return [{"loc": [str(p) for p in (*prefix, *e.get("loc", ()))], "msg": str(e.get("msg", "")),
             "type": str(e.get("type", ""))} for e in errors]


def validation_message(errors: Sequence[Mapping[str, Any]]) -> str:
    """The first error as a sentence that starts with the field's name (``inputs[0].min: ...``)."""
    if not errors:
        return "request: invalid request"
    loc = [int(p) if isinstance(p, str) and p.isdigit() else p for p in errors[0].get("loc", ())]
    return f"{field_path(loc) or 'request'}: {errors[0].get('msg', '')}"


class StoreBusy(ServiceError):
    status = 503
    code = "store_busy"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after
