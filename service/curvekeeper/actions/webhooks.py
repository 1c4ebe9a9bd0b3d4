"""Webhooks (admin): make, list, delete, test-send; their deliveries, and re-sending a
dead one. Sending is the dispatcher's (``curvekeeper.webhooks.dispatcher``)."""

from __future__ import annotations

import secrets
from collections.abc import Callable, Iterable
from datetime import datetime
from typing import Any

from ..errors import DeliveryNotFound, InvalidRequest, WebhookNotFound
from ..store import Repository
from ..store.tables import Webhook, WebhookDelivery
from ..webhooks import KINDS, policy
from .paging import Page, decode_cursor, decode_text_cursor, encode_cursor

STATES = ("pending", "delivered", "dead")


def _item(h: Webhook) -> dict[str, Any]:
    return {"id": h.id, "url": h.url, "events": list(h.events), "created_at": h.created_at}


def delivery_item(d: WebhookDelivery) -> dict[str, Any]:
    return {"id": d.pk, "event_id": d.event_pk, "state": d.state, "attempts": d.attempts,
            "next_attempt_at": d.next_attempt_at if d.state == "pending" else None,
            "last_status": d.last_status, "last_error": d.last_error, "created_at": d.created_at,
            "delivered_at": d.delivered_at}


def _load(repo: Repository, wid: str) -> Webhook:
    hook = repo.get_webhook(wid)
    if hook is None:
        raise WebhookNotFound(f"no webhook {wid!r}")
    return hook


def create(repo: Repository, *, url: str, events: Iterable[str], secret: str, allow_link_local: bool,
           resolver: Callable[[str], Iterable[str]] = policy.resolve) -> dict[str, Any]:
    """A new webhook and, this once, its secret. Unknown event kinds and refused URLs: 422."""
    kinds = list(dict.fromkeys(events))
    unknown = [k for k in kinds if k not in KINDS]
    if unknown or not kinds:
        raise InvalidRequest(f"events must name at least one of {', '.join(KINDS)}",
                             details={"field": "events", "unknown": unknown})
    try:
        policy.check(url, allow_link_local=allow_link_local, resolver=resolver)
    except policy.Refused as exc:
        raise InvalidRequest(f"webhook url refused: {exc}", details={"field": "url"}) from exc
    hook = Webhook(id="wh_" + secrets.token_hex(8), url=url, events=kinds, secret=secret)
    repo.insert_webhook(hook)
    return {**_item(hook), "secret": secret}


def list_(repo: Repository, *, cursor: str | None, limit: int) -> Page:
    rows = repo.list_webhooks(after_id=decode_text_cursor(cursor), limit=limit + 1)
    return Page([_item(h) for h in rows[:limit]], encode_cursor(rows[limit - 1].id) if len(rows) > limit else None)


def delete(repo: Repository, wid: str) -> dict[str, Any]:
    hook = _load(repo, wid)
    out = _item(hook)
    repo.delete_webhook(hook)
    return out


def test_send(repo: Repository, wid: str, now: datetime) -> dict[str, Any]:
    """Queue a test delivery (event kind ``webhook_test``), due at once."""
    hook = _load(repo, wid)
    d = WebhookDelivery(webhook_pk=hook.pk, event_pk=None, state="pending", attempts=0, next_attempt_at=now,
                        created_at=now)
    repo.insert_delivery(d)
    return delivery_item(d)


def deliveries(repo: Repository, wid: str, *, state: str | None, cursor: str | None, limit: int) -> Page:
    if state is not None and state not in STATES:
        raise InvalidRequest(f"state is one of {', '.join(STATES)}", details={"field": "state"})
    hook = _load(repo, wid)
    rows = repo.list_deliveries(hook.pk, state=state, after_pk=decode_cursor(cursor), limit=limit + 1)
    return Page([delivery_item(d) for d in rows[:limit]],
                encode_cursor(rows[limit - 1].pk) if len(rows) > limit else None)


def resend(repo: Repository, wid: str, did: int, now: datetime) -> dict[str, Any]:
    """Send a delivery again from its first attempt (a dead one, or a delivered one asked again)."""
    hook = _load(repo, wid)
    d = repo.get_delivery(hook.pk, did)
    if d is None:
        raise DeliveryNotFound(f"no delivery {did} of webhook {wid!r}")
    repo.reset_delivery(d, now)
    return delivery_item(d)
