"""Domain errors raised below the HTTP layer. They carry a stable ``code`` and a message,
never an HTTP status: ``curvekeeper.api.errors`` maps each class to its status (and core
errors, ``curvekeeper.core.errors``, too).

    ServiceError
    ├── Unauthorized      missing, unknown or revoked key
    ├── Forbidden         role or channel prefix not allowed
    ├── NotFound          ChannelNotFound, SnapshotNotFound, KeyNotFound
    ├── Conflict          ChannelExists, ImmutableField, NothingToAcknowledge, ServiceUnchanged, NotCalibrated
    ├── PayloadTooLarge   too many samples, points or bytes
    ├── InvalidRequest    a value the schema cannot catch
    │   └── InvalidConfig a merged channel configuration the declaration refuses
    ├── StoreBusy         the store is locked or unreachable (retry after ``retry_after`` s)
    ├── NotReady          still starting: the compiled kernels are not built (retry after ``retry_after`` s)
    └── StateDamaged      a stored model state cannot be restored: the server's fault
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any


class ServiceError(Exception):
    code = "internal_error"

    def __init__(self, message: str, details: Any = None) -> None:
        super().__init__(message)
        self.message = message
        self.details = details


class Unauthorized(ServiceError):
    code = "unauthorized"


class Forbidden(ServiceError):
    code = "forbidden"


class NotFound(ServiceError):
    code = "not_found"


class ChannelNotFound(NotFound):
    code = "channel_not_found"


class SnapshotNotFound(NotFound):
    code = "snapshot_not_found"


class KeyNotFound(NotFound):
    code = "key_not_found"


class Conflict(ServiceError):
    code = "conflict"


class ChannelExists(Conflict):
    code = "channel_exists"


class ImmutableField(Conflict):
    code = "immutable_field"


class NothingToAcknowledge(Conflict):
    code = "nothing_to_acknowledge"


class ServiceUnchanged(Conflict):
    code = "service_unchanged"


class NotCalibrated(Conflict):
    """The channel has no curve yet (no calibration, no learnt sample): nothing to predict
    with until it is calibrated."""

    code = "not_calibrated"


class PayloadTooLarge(ServiceError):
    code = "payload_too_large"


class InvalidRequest(ServiceError):
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
    code = "store_busy"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after


class StateDamaged(ServiceError):
    """A channel's (or snapshot's) stored state cannot be restored: damaged or written by
    an incompatible version. Nothing the client sent is wrong; the way out is a rollback
    to a snapshot."""

    code = "state_damaged"


class NotReady(ServiceError):
    code = "not_ready"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after
