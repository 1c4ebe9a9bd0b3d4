"""Domain errors raised below the HTTP layer. They carry a stable ``code`` and a message,
never an HTTP status: ``curvekeeper.api.errors`` maps each class to its status (and core
errors, ``curvekeeper.core.errors``, too).

    ServiceError
    ├── Unauthorized      missing, unknown or revoked key
    ├── Forbidden         role or channel prefix not allowed
    ├── NotFound          ChannelNotFound, SnapshotNotFound, KeyNotFound, ReferenceNotFound
    ├── Conflict          ChannelExists, ImmutableField, NothingToAcknowledge, ServiceUnchanged, NotCalibrated,
    │                     ChannelArchived, AlreadyArchived, NotArchived, ReferenceExists, ReferenceRetired,
    │                     ReferenceOverdue
    ├── PayloadTooLarge   too many samples, points or bytes
    ├── InvalidRequest    a value the schema cannot catch
    │   ├── InvalidConfig a merged channel configuration the declaration refuses
    │   └── ReferenceRequired  a sample without a reference on a channel that requires one
    ├── StoreBusy         the store is locked or unreachable (retry after ``retry_after`` s)
    ├── NotReady          still starting: the compiled kernels are not built (retry after ``retry_after`` s)
    └── StateDamaged      a stored model state cannot be restored: the server's fault
"""

from __future__ import annotations

import re
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


class ReferenceNotFound(NotFound):
    code = "reference_not_found"
class WebhookNotFound(NotFound):
    code = "webhook_not_found"


class DeliveryNotFound(NotFound):
    code = "delivery_not_found"


class CalibrationNotFound(NotFound):
    code = "calibration_not_found"


class Conflict(ServiceError):
    code = "conflict"


class ReferenceExists(Conflict):
    code = "reference_exists"


class ReferenceRetired(Conflict):
    """The reference instrument is retired: no new sample or calibration may name it."""

    code = "reference_retired"


class ReferenceOverdue(Conflict):
    """The reference instrument's due date lies before the calibration's date; a calibration
    may still use it with ``allow_overdue_reference``, which is recorded."""

    code = "reference_overdue"


class ChannelExists(Conflict):
    code = "channel_exists"


class ImmutableField(Conflict):
    code = "immutable_field"


class NothingToAcknowledge(Conflict):
    code = "nothing_to_acknowledge"


class ServiceUnchanged(Conflict):
    code = "service_unchanged"


class AlreadySuperseded(Conflict):
    """A calibration record is superseded once: a further correction supersedes the correction."""

    code = "already_superseded"


class NotCalibrated(Conflict):
    """The channel has no curve yet (no calibration, no learnt sample): nothing to predict
    with until it is calibrated."""

    code = "not_calibrated"


class ChannelArchived(Conflict):
    """The channel is archived: its history can be read, but it takes no samples and no
    changes until it is unarchived."""

    code = "archived"


class AlreadyArchived(Conflict):
    code = "already_archived"


class NotArchived(Conflict):
    code = "not_archived"


class PayloadTooLarge(ServiceError):
    code = "payload_too_large"


class InvalidRequest(ServiceError):
    code = "invalid_request"


class ReferenceRequired(InvalidRequest):
    """The channel requires each sample to name its reference instrument; one does not."""

    code = "reference_required"


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


#: pydantic's plain type names, which it puts in a location for a member of a union
_TYPE_NAMES = frozenset({"int", "float", "str", "bool", "list", "dict", "none", "datetime"})
_MEMBER = re.compile(r"[-\[\]]")


def _is_member(part: Any) -> bool:
    """A member of a union as pydantic names it in a location (``constrained-float``,
    ``list[constrained-float]``, a model's class name), never a field: fields are snake_case."""
    return isinstance(part, str) and (bool(_MEMBER.search(part)) or part[:1].isupper() or part in _TYPE_NAMES)


#: what is wrong, in the field's own words, by pydantic's error type
SENTENCES = {
    "missing": "is required", "extra_forbidden": "is not a known field",
    "float_type": "must be a finite number", "float_parsing": "must be a finite number",
    "finite_number": "must be a finite number", "int_type": "must be a whole number",
    "int_parsing": "must be a whole number", "int_from_float": "must be a whole number",
    "bool_type": "must be true or false", "bool_parsing": "must be true or false", "string_type": "must be text",
    "list_type": "must be a list", "dict_type": "must be an object", "model_type": "must be an object",
    "model_attributes_type": "must be an object", "datetime_type": "must be an ISO-8601 date-time with a time zone",
    "datetime_parsing": "must be an ISO-8601 date-time with a time zone",
    "datetime_from_date_parsing": "must be an ISO-8601 date-time with a time zone",
    "timezone_aware": "must have a time zone (e.g. Z or +02:00)", "union_tag_not_found": "is required",
}
BOUNDS = {"greater_than": ("gt", "must be greater than"), "greater_than_equal": ("ge", "must be at least"),
          "less_than": ("lt", "must be less than"), "less_than_equal": ("le", "must be at most")}
#: pydantic's phrasing of the errors not listed above, turned into ours
_REWORDS = ((re.compile(r"^(Input|Value|List|String) should (be|have)"), r"must \2"),
            (re.compile(r"^Field required$"), "is required"), (re.compile(r" after validation"), ""),
            (re.compile(r"^(Value error|Assertion failed), "), ""))


def _number(v: Any) -> str:
    if isinstance(v, float) and v.is_integer() and abs(v) < 1e16:
        return str(int(v))
    return f"{v:g}".replace("e+", "e") if isinstance(v, float) else str(v)


def sentence(error: Mapping[str, Any]) -> str:
    """What is wrong with the field, as a sentence without its name ("must be a finite number")."""
    kind, ctx, msg = str(error.get("type", "")), error.get("ctx") or {}, str(error.get("msg", ""))
    if kind in SENTENCES:
        return SENTENCES[kind]
    if kind in BOUNDS and BOUNDS[kind][0] in ctx:
        key, words = BOUNDS[kind]
        return f"{words} {_number(ctx[key])}"
    n = ctx.get("min_length", ctx.get("max_length"))
    if kind in ("too_short", "too_long", "string_too_short", "string_too_long") and n is not None:
        text = kind.startswith("string") or isinstance(error.get("input"), str)
        if kind.endswith("short"):
            return "must not be empty" if n == 1 else f"must {'be' if text else 'have'} at least {n} " \
                f"{'characters' if text else 'items'}"
        return f"must {'be' if text else 'have'} at most {n} {'characters' if text else 'items'}"
    if kind == "literal_error" and "expected" in ctx:
        return f"must be {ctx['expected']}"
    if kind == "union_tag_invalid" and "expected_tags" in ctx:
        return f"must be one of {ctx['expected_tags']}"
    if kind == "string_pattern_mismatch" and "pattern" in ctx:
        return f"must match the pattern {ctx['pattern']}"
    for pattern, words in _REWORDS:
        msg = pattern.sub(words, msg)
    return msg


def validation_details(errors: Iterable[Mapping[str, Any]], prefix: tuple[str, ...] = ()) -> list[dict[str, Any]]:
    """Validation errors as the error body's details: each ``loc`` (the field's path, strings),
    ``msg`` (a sentence) and ``type``. The members of a union pydantic tried are not named:
    of one union's errors the one that reached deepest into the value stands for them all."""
    out: list[dict[str, Any]] = []
    union: dict[tuple[Any, ...], int] = {}  # the location of a union -> its error's index in out
    for e in errors:
        loc = (*prefix, *e.get("loc", ()))
        cut = next((i for i, p in enumerate(loc) if _is_member(p)), None)
        item = {"loc": [str(p) for p in loc if not _is_member(p)], "msg": sentence(e), "type": str(e.get("type", ""))}
        if cut is None:
            out.append(item)
        elif loc[:cut] not in union:
            union[loc[:cut]] = len(out)
            out.append(item)
        elif len(item["loc"]) > len(out[union[loc[:cut]]]["loc"]):
            out[union[loc[:cut]]] = item
    return out


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
