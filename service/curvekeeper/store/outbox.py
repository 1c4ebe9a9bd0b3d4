"""The SQL of what leaves the service: webhooks and their delivery outbox, and the event
feed (the events topics over MQTT). A part of ``Repository``; the outbox rows themselves
are written with their events by ``Repository.insert_events``."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any

from sqlalchemy import delete, func, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .tables import Channel, Event, EventFeed, Webhook, WebhookDelivery


class OutboxQueries:
    session: Session

    # webhooks ------------------------------------------------------------------------
    def insert_webhook(self, hook: Webhook) -> None:
        self.session.add(hook)
        self.session.flush()

    def get_webhook(self, wid: str) -> Webhook | None:
        return self.session.scalars(select(Webhook).where(Webhook.id == wid)).one_or_none()

    def list_webhooks(self, *, after_id: str | None, limit: int) -> Sequence[Webhook]:
        stmt = select(Webhook).order_by(Webhook.id).limit(limit)
        if after_id is not None:
            stmt = stmt.where(Webhook.id > after_id)
        return self.session.scalars(stmt).all()

    def delete_webhook(self, hook: Webhook) -> None:
        """The webhook and its deliveries (pending ones are dropped: nobody wants them now)."""
        self.session.execute(delete(WebhookDelivery).where(WebhookDelivery.webhook_pk == hook.pk))
        self.session.delete(hook)
        self.session.flush()

    def insert_delivery(self, delivery: WebhookDelivery) -> None:
        self.session.add(delivery)
        self.session.flush()

    def get_delivery(self, webhook_pk: int, pk: int) -> WebhookDelivery | None:
        return self.session.scalars(select(WebhookDelivery).where(WebhookDelivery.pk == pk,
                                                                  WebhookDelivery.webhook_pk == webhook_pk)
                                    ).one_or_none()

    def list_deliveries(self, webhook_pk: int, *, state: str | None, after_pk: int | None,
                        limit: int) -> Sequence[WebhookDelivery]:
        stmt = (select(WebhookDelivery).where(WebhookDelivery.webhook_pk == webhook_pk)
                .order_by(WebhookDelivery.pk).limit(limit))
        if state:
            stmt = stmt.where(WebhookDelivery.state == state)
        if after_pk is not None:
            stmt = stmt.where(WebhookDelivery.pk > after_pk)
        return self.session.scalars(stmt).all()

    def due_deliveries(self, now: datetime, limit: int) -> list[tuple[int, int]]:
        """(pk, webhook_pk) of pending deliveries due at ``now``, oldest due first."""
        rows = self.session.execute(
            select(WebhookDelivery.pk, WebhookDelivery.webhook_pk)
            .where(WebhookDelivery.state == "pending", WebhookDelivery.next_attempt_at <= now)
            .order_by(WebhookDelivery.next_attempt_at, WebhookDelivery.pk).limit(limit))
        return [(pk, hook) for pk, hook in rows]

    def claim_delivery(self, pk: int, now: datetime, until: datetime) -> bool:
        """Take a due delivery for one attempt (one conditional UPDATE: of processes racing
        for it, one wins): counts the attempt and holds it until ``until``."""
        res = self.session.execute(
            update(WebhookDelivery).where(WebhookDelivery.pk == pk, WebhookDelivery.state == "pending",
                                          WebhookDelivery.next_attempt_at <= now)
            .values(next_attempt_at=until, attempts=WebhookDelivery.attempts + 1)
            .execution_options(synchronize_session=False))
        return bool(getattr(res, "rowcount", 0) == 1)

    def delivery_to_send(self, pk: int) -> tuple[WebhookDelivery, Webhook, Event | None, str | None]:
        """A delivery with its webhook, its event (None: a test send) and the event's channel id."""
        d = self.session.get_one(WebhookDelivery, pk)
        hook = self.session.get_one(Webhook, d.webhook_pk)
        if d.event_pk is None:
            return d, hook, None, None
        ev, cid = self.session.execute(select(Event, Channel.id).outerjoin(Channel, Channel.pk == Event.channel_pk)
                                       .where(Event.pk == d.event_pk)).one()
        return d, hook, ev, cid

    def reset_delivery(self, d: WebhookDelivery, now: datetime) -> None:
        """Make a delivery pending again from its first attempt, due at ``now``."""
        d.state, d.attempts, d.next_attempt_at, d.delivered_at = "pending", 0, now, None
        self.session.flush()

    def record_delivery(self, pk: int, **values: Any) -> None:
        self.session.execute(update(WebhookDelivery).where(WebhookDelivery.pk == pk).values(**values)
                             .execution_options(synchronize_session=False))

    def outbox_depth(self) -> dict[str, int]:
        """Deliveries ``pending`` (the outbox's depth) and ``dead``."""
        rows = self.session.execute(select(WebhookDelivery.state, func.count()).where(
            WebhookDelivery.state.in_(("pending", "dead"))).group_by(WebhookDelivery.state))
        out = {"pending": 0, "dead": 0}
        out.update({state: int(n) for state, n in rows})
        return out

    # the event feed --------------------------------------------------------------------
    def ensure_feed(self, name: str) -> None:
        """Make feed ``name`` if it is new, at the latest event: it publishes what happens from
        now on, not the history. (Two processes making it at once: one row, the other's
        INSERT is dropped.)"""
        if self.session.get(EventFeed, name) is not None:
            return
        try:
            with self.session.begin_nested():
                self.session.add(EventFeed(name=name, last_event_pk=self.latest_event_pk()))
        except IntegrityError:
            pass

    def lease_feed(self, name: str, owner: str, now: datetime, until: datetime) -> int | None:
        """Hold feed ``name`` for ``owner`` until ``until`` when it is free at ``now`` (or
        ``owner``'s already): the last event published, else None (another holds it)."""
        res = self.session.execute(
            update(EventFeed).where(EventFeed.name == name,
                                    (EventFeed.lease_until.is_(None)) | (EventFeed.lease_until <= now)
                                    | (EventFeed.lease_owner == owner))
            .values(lease_owner=owner, lease_until=until).returning(EventFeed.last_event_pk)
            .execution_options(synchronize_session=False)).first()
        return None if res is None else int(res[0])

    def feed_events(self, after_pk: int, kinds: Sequence[str], limit: int) -> list[tuple[Event, str]]:
        """Channel events of ``kinds`` after event ``after_pk``, oldest first, with their channel's id."""
        rows = self.session.execute(select(Event, Channel.id).join(Channel, Channel.pk == Event.channel_pk)
                                    .where(Event.pk > after_pk, Event.kind.in_(kinds))
                                    .order_by(Event.pk).limit(limit))
        return [(ev, cid) for ev, cid in rows]

    def latest_event_pk(self) -> int:
        return int(self.session.scalar(select(func.coalesce(func.max(Event.pk), 0))) or 0)

    def advance_feed(self, name: str, owner: str, last_event_pk: int) -> bool:
        """Record that ``owner`` published up to ``last_event_pk``, while it holds the lease."""
        res = self.session.execute(
            update(EventFeed).where(EventFeed.name == name, EventFeed.lease_owner == owner,
                                    EventFeed.last_event_pk < last_event_pk)
            .values(last_event_pk=last_event_pk).execution_options(synchronize_session=False))
        return bool(getattr(res, "rowcount", 0) == 1)
