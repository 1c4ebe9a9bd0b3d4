"""Domain errors raised below the HTTP layer; ``curvekeeper.api.errors`` maps them to the
contract's error body. Core errors (``curvekeeper.core.errors``) are mapped there too.

    ServiceError
    ├── Unauthorized      401 missing, unknown or revoked key
    ├── Forbidden         403 role or channel prefix not allowed
    ├── NotFound          404 (ChannelNotFound, SnapshotNotFound, KeyNotFound)
    ├── Conflict          409 (ChannelExists, ImmutableField)
    ├── PayloadTooLarge   413 too many samples, points or bytes
    ├── InvalidRequest    422 a value the schema cannot catch
    ├── StoreBusy         503 the store is locked or unreachable (Retry-After)
    └── NotReady          503 the service is still starting: the compiled kernels are not built (Retry-After)
"""

from __future__ import annotations

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


class StoreBusy(ServiceError):
    status = 503
    code = "store_busy"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after


class NotReady(ServiceError):
    status = 503
    code = "not_ready"

    def __init__(self, message: str, details: Any = None, retry_after: int = 1) -> None:
        super().__init__(message, details)
        self.retry_after = retry_after
