"""One MQTT message of samples, learned as ``POST /v1/channels/{id}/samples`` learns its
body: the same validation, the same action in one unit of work, the same answer or error
body. Authorisation is the broker's (its ACL gives each device its channel prefix), so
there is no API key here."""

from __future__ import annotations

import json
import logging
import time
from dataclasses import dataclass
from typing import Any

from fastapi.exceptions import RequestValidationError

from ..actions import samples
from ..actions.samples import SampleBatch
from ..actions.unit import Work
from ..api.bodies import check_items, validate_body
from ..api.deps import check_times
from ..api.errors import error_body, status_of
from ..api.schemas.samples import SampleItem, SamplesIn
from ..api.schemas.samples_columns import answer_of, column_count, is_columnar, read_columns
from ..config import Settings
from ..core import CoreError, StateError
from ..errors import NotReady, ServiceError, StateDamaged, StoreBusy, validation_details, validation_message
from ..metrics import Metrics

log = logging.getLogger("curvekeeper.mqtt")


@dataclass(frozen=True)
class Reply:
    """What a message earned: the body published on the results topic (the HTTP answer
    or error body), its HTTP status, and whether the message may be acknowledged (False
    only for a transient fault: the broker must deliver the message again)."""

    status: int
    body: dict[str, Any]
    ack: bool = True


def _error(status: int, code: str, message: str, details: Any = None, *, ack: bool = True) -> Reply:
    return Reply(status, error_body(code, message, details), ack)


def _parse(payload: bytes) -> Any:
    """The payload's JSON; raises ``RequestValidationError`` as FastAPI does for a body."""
    try:
        return json.loads(payload.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise RequestValidationError([{"type": "json_invalid", "loc": ("body", exc.start),
                                       "msg": "JSON decode error", "ctx": {"error": "not UTF-8"}}]) from None
    except json.JSONDecodeError as exc:
        raise RequestValidationError([{"type": "json_invalid", "loc": ("body", exc.pos),
                                       "msg": "JSON decode error", "ctx": {"error": exc.msg}}]) from None


def ingest_message(work: Work, settings: Settings, metrics: Metrics, channel_id: str, payload: bytes) -> Reply:
    """Learn the samples of one message for ``channel_id`` (committed before this returns
    an accepted reply); never raises for anything the message holds. Counted by outcome."""
    reply = _learn(work, settings, metrics, channel_id, payload)
    metrics.observe_mqtt(reply.status, reply.ack)
    return reply


def _learn(work: Work, settings: Settings, metrics: Metrics, channel_id: str, payload: bytes) -> Reply:
    try:
        raw = _parse(payload)
        form: str | None = None
        items: list[SampleItem] | SampleBatch
        if is_columnar(raw):  # the columnar body, as the route takes it
            check_items(column_count(raw), settings.max_batch, "samples", "max_batch")
            col = read_columns(raw, settings.max_clock_skew_s)
            items, source, reference, form = col.batch, col.source, col.reference, col.answer
        else:
            check_items(len(raw["samples"]) if isinstance(raw, dict) and isinstance(raw.get("samples"), list) else 0,
                        settings.max_batch, "samples", "max_batch")
            body = validate_body(raw, SamplesIn, "samples")
            check_times(body.samples, settings)
            items, source, reference = body.samples, body.source, body.reference
        deadline = time.monotonic() + work.store.busy_timeout_s
        with work.unit(write=True, deadline=deadline) as unit:
            out = samples.ingest(unit, channel_id, items, source, None, reference)
    except RequestValidationError as exc:
        errors = validation_details(exc.errors())
        if any(e["type"] == "json_invalid" for e in errors):
            return _error(400, "malformed_json", "the request body is not valid JSON", errors)
        return _error(422, "validation_error", validation_message(errors), errors)
    except (StoreBusy, NotReady) as exc:
        # transient: not acknowledged, so the broker delivers the message again
        log.warning("store unavailable for an MQTT message on %s: %s", channel_id, exc.message)
        return _error(503, exc.code, exc.message, exc.details, ack=False)
    except ServiceError as exc:
        status = status_of(exc)
        if status == 500:
            log.error("%s: %s (%s)", exc.code, exc.message, exc.details)
        return _error(status, exc.code, exc.message, exc.details)
    except StateError as exc:
        log.error("stored state cannot be restored: %s", exc.message)
        return _error(500, StateDamaged.code, "a stored state cannot be restored; it has been logged",
                      {"field": exc.field})
    except CoreError as exc:
        return _error(422, exc.code, exc.message, {"field": exc.field})
    metrics.observe_samples(out.accepted, len(out.rejected), out.duplicates, out.alarms)
    return Reply(200, answer_of(out, form).model_dump(mode="json"))
