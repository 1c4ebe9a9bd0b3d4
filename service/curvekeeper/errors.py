"""Domain errors raised below the HTTP layer. They carry a stable ``code`` and a message,
never an HTTP status: ``curvekeeper.api.errors`` maps each class to its status (and core
errors, ``curvekeeper.core.errors``, too).

    ServiceError
    ├── Unauthorized      missing, unknown or revoked key
    ├── Forbidden         role or channel prefix not allowed
    ├── NotFound          ChannelNotFound, SnapshotNotFound, KeyNotFound
    ├── Conflict          ChannelExists, ImmutableField
    ├── PayloadTooLarge   too many samples, points or bytes
    ├── InvalidRequest    a value the schema cannot catch
    ├── StoreBusy         the store is locked or unreachable (retry after ``retry_after`` s)
    ├── NotReady          still starting: the compiled kernels are not built (retry after ``retry_after`` s)
    └── StoredStateDamaged a stored model state cannot be restored: the server's fault
"""

from __future__ import annotations

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


class PayloadTooLarge(ServiceError):
    code = "payload_too_large"


class InvalidRequest(ServiceError):
    code = "invalid_request"


class StoreBusy(ServiceError):
    code = "store_busy"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after


class StoredStateDamaged(ServiceError):
    """A channel's (or snapshot's) stored state cannot be restored: damaged or written by
    an incompatible version. Nothing the client sent is wrong."""

    code = "stored_state_damaged"


class NotReady(ServiceError):
    code = "not_ready"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after
