"""Tables (SQLAlchemy 2, typed). Only ``curvekeeper.store.repository`` queries them.

Timestamps are timezone-aware UTC. The sample log is append-only; a channel's
model state lives in one row of ``channel_state`` that every write locks.
"""

from __future__ import annotations

from datetime import UTC, date, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
)
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


def utcnow() -> datetime:
    return datetime.now(UTC)


class UTCDateTime(TypeDecorator[datetime]):
    """Stores aware datetimes as UTC; SQLite gives them back naive, this makes them aware."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime")
        return value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


class Channel(Base):
    """A channel's identity and configuration (defaults filled in): the one place the
    channel's current configuration is kept."""

    __tablename__ = "channel"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    id: Mapped[str] = mapped_column(String(128), unique=True)
    config: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    #: when the channel was archived (its history kept, no new samples or changes); null: live
    archived_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)


class ChannelState(Base):
    """The channel's current model state (learned values only) and the summary the list
    routes filter on."""

    __tablename__ = "channel_state"

    channel_pk: Mapped[int] = mapped_column(ForeignKey("channel.pk", ondelete="CASCADE"), primary_key=True)
    model_state: Mapped[dict[str, Any]] = mapped_column(JSON)
    version: Mapped[int] = mapped_column(BigInteger, default=0)
    n_samples: Mapped[int] = mapped_column(BigInteger, default=0)
    n_rejected: Mapped[int] = mapped_column(BigInteger, default=0)
    drift_state: Mapped[str] = mapped_column(String(16), default="ok")
    tolerance_state: Mapped[str | None] = mapped_column(String(24), nullable=True)
    rmse: Mapped[float | None] = mapped_column(Float, nullable=True)
    last_sample_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # the due date, for the list's due_state filter: from the latest calibration record's
    # ``at`` and the channel's interval (null: never calibrated); due soon from due_soon_on
    last_calibrated_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    due_on: Mapped[date | None] = mapped_column(Date, nullable=True)
    due_soon_on: Mapped[date | None] = mapped_column(Date, nullable=True)
    #: ``in_service`` / ``out_of_service`` (the model state's), for counts by state
    service_state: Mapped[str] = mapped_column(String(16), server_default="in_service")
    # the silence watch (``actions.stale``): silent since the latest sample's receipt (or the
    # channel's creation or unarchiving, when later); stale from ``stale_after`` (silent_since +
    # 3 expected_interval; null: not watched, or archived); ``stale_since`` is set once the
    # ``stale`` event is written (null again with ``stale_cleared``)
    silent_since: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    stale_after: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True, index=True)
    stale_since: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    #: the due watch (``actions.duewatch``): ``due_soon`` or ``overdue`` once that event is
    #: written for the current ``due_on`` (null again when the due date changes)
    due_noticed: Mapped[str | None] = mapped_column(String(16), nullable=True)


class Sample(Base):
    """One stored sample; ``seq`` is the channel's server sequence number (1, 2, ...) and
    ``version`` the channel's version once the sample was learned (for replay)."""

    __tablename__ = "sample"
    __table_args__ = (
        UniqueConstraint("channel_pk", "seq", name="uq_sample_channel_seq"),
        Index("ix_sample_source", "channel_pk", "source", "source_seq", unique=True),
    )

    pk: Mapped[int] = mapped_column(BigInteger().with_variant(Integer, "sqlite"), primary_key=True)
    channel_pk: Mapped[int] = mapped_column(ForeignKey("channel.pk", ondelete="CASCADE"))
    seq: Mapped[int] = mapped_column(BigInteger)
    version: Mapped[int] = mapped_column(BigInteger)
    source: Mapped[str | None] = mapped_column(String(128), nullable=True)
    source_seq: Mapped[int | None] = mapped_column(BigInteger, nullable=True)
    t: Mapped[datetime] = mapped_column(UTCDateTime)
    received_at: Mapped[datetime] = mapped_column(UTCDateTime)
    x: Mapped[list[float]] = mapped_column(JSON)
    y: Mapped[float] = mapped_column(Float)
    residual: Mapped[float | None] = mapped_column(Float, nullable=True)
    drift_statistic: Mapped[float | None] = mapped_column(Float, nullable=True)
    accepted: Mapped[bool] = mapped_column(Boolean)
    reason: Mapped[str | None] = mapped_column(String(16), nullable=True)
    #: the id of the reference instrument that gave y, when the sample named one
    reference: Mapped[str | None] = mapped_column(String(128), nullable=True)


class Snapshot(Base):
    """A stored copy of a channel's model state, with the configuration it was taken under
    (a rollback restores both)."""

    __tablename__ = "snapshot"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    channel_pk: Mapped[int] = mapped_column(ForeignKey("channel.pk", ondelete="CASCADE"), index=True)
    reason: Mapped[str] = mapped_column(String(32))
    label: Mapped[str | None] = mapped_column(String(256), nullable=True)
    config: Mapped[dict[str, Any]] = mapped_column(JSON)
    model_state: Mapped[dict[str, Any]] = mapped_column(JSON)
    version: Mapped[int] = mapped_column(BigInteger)
    n_samples: Mapped[int] = mapped_column(BigInteger)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class Event(Base):
    """Drift state changes, guards, calibrations, snapshots, rollbacks, settings changes."""

    __tablename__ = "event"

    pk: Mapped[int] = mapped_column(BigInteger().with_variant(Integer, "sqlite"), primary_key=True)
    channel_pk: Mapped[int | None] = mapped_column(ForeignKey("channel.pk", ondelete="CASCADE"),
                                                   nullable=True, index=True)
    kind: Mapped[str] = mapped_column(String(32))
    version: Mapped[int | None] = mapped_column(BigInteger, nullable=True)
    key_id: Mapped[str | None] = mapped_column(String(40), nullable=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    details: Mapped[dict[str, Any]] = mapped_column(JSON)


class ReferenceInstrument(Base):
    """A reference instrument (standard) that samples and calibrations name: its stated
    uncertainty as U with k (u = U / k; for a rectangular or triangular distribution U is
    the half-width a and k its divisor, sqrt 3 or sqrt 6), its certificate and validity.
    Never deleted once made: ``retired`` instead."""

    __tablename__ = "reference_instrument"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    id: Mapped[str] = mapped_column(String(128), unique=True)
    description: Mapped[str] = mapped_column(Text, default="")
    unit: Mapped[str] = mapped_column(String(256))
    expanded_uncertainty: Mapped[float] = mapped_column(Float)
    coverage_factor: Mapped[float] = mapped_column(Float)
    distribution: Mapped[str] = mapped_column(String(16))
    certificate: Mapped[str] = mapped_column(String(256))
    calibrated_on: Mapped[date] = mapped_column(Date)
    due_on: Mapped[date] = mapped_column(Date, index=True)
    note: Mapped[str] = mapped_column(Text, default="")
    retired: Mapped[bool] = mapped_column(Boolean, default=False)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class CalibrationRecord(Base):
    """What one calibration found and left, immutable once written: a correction is a new
    record whose ``supersedes`` names this one (at most one does: unique). ``record``
    holds the body (as found, as left, fit, budget, conditions, references, decision rule,
    interval suggestion); ``at`` is when the calibration was done, ``created_at`` when stored."""

    __tablename__ = "calibration_record"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    channel_pk: Mapped[int] = mapped_column(ForeignKey("channel.pk", ondelete="CASCADE"), index=True)
    version: Mapped[int] = mapped_column(BigInteger)
    at: Mapped[datetime] = mapped_column(UTCDateTime)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    key_id: Mapped[str | None] = mapped_column(String(40), nullable=True)
    verdict: Mapped[str] = mapped_column(String(16))
    supersedes: Mapped[int | None] = mapped_column(ForeignKey("calibration_record.pk"), nullable=True, unique=True)
    record: Mapped[dict[str, Any]] = mapped_column(JSON)


class ApiKey(Base):
    """An API key; only the SHA-256 of its secret is stored."""

    __tablename__ = "api_key"

    id: Mapped[str] = mapped_column(String(40), primary_key=True)
    secret_hash: Mapped[str] = mapped_column(String(64), unique=True)
    role: Mapped[str] = mapped_column(String(16))
    prefixes: Mapped[list[str]] = mapped_column(JSON)
    label: Mapped[str | None] = mapped_column(Text, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    #: the last authenticated use, to the minute at best (written at most once a minute per key)
    last_used_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)


class CurveTrace(Base):
    """A channel's curve against its reference curve since the last calibration, for the
    forecast: at measurement time ``t``, the largest |current - reference| curve difference
    over the input range and the curve's standard uncertainty ``u`` there (output units).
    Spaced by ``actions.trace.record`` (bounded per channel); a calibration
    (or a rollback that sets the reference) clears them."""

    __tablename__ = "curve_trace"
    __table_args__ = (Index("ix_curve_trace_channel_t", "channel_pk", "t"),)

    pk: Mapped[int] = mapped_column(BigInteger().with_variant(Integer, "sqlite"), primary_key=True)
    channel_pk: Mapped[int] = mapped_column(ForeignKey("channel.pk", ondelete="CASCADE"))
    t: Mapped[datetime] = mapped_column(UTCDateTime)
    difference: Mapped[float] = mapped_column(Float)
    u: Mapped[float | None] = mapped_column(Float, nullable=True)
    version: Mapped[int] = mapped_column(BigInteger)


class Webhook(Base):
    """A webhook: where events of the listed kinds are POSTed. ``secret`` is kept as given
    (not hashed): the dispatcher signs each body with it (HMAC-SHA256), so the store holds it."""

    __tablename__ = "webhook"

    pk: Mapped[int] = mapped_column(Integer, primary_key=True)
    id: Mapped[str] = mapped_column(String(40), unique=True)
    url: Mapped[str] = mapped_column(Text)
    events: Mapped[list[str]] = mapped_column(JSON)
    secret: Mapped[str] = mapped_column(String(256))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class WebhookDelivery(Base):
    """The outbox: one event (None: a test send) owed to one webhook. ``state`` is pending,
    delivered or dead; a pending delivery is due at ``next_attempt_at`` (a claim moves it
    ahead by a lease, so a crashed sender's claim expires and another process retries)."""

    __tablename__ = "webhook_delivery"
    __table_args__ = (Index("ix_webhook_delivery_due", "state", "next_attempt_at"),)

    pk: Mapped[int] = mapped_column(BigInteger().with_variant(Integer, "sqlite"), primary_key=True)
    webhook_pk: Mapped[int] = mapped_column(ForeignKey("webhook.pk", ondelete="CASCADE"), index=True)
    event_pk: Mapped[int | None] = mapped_column(BigInteger, ForeignKey("event.pk", ondelete="CASCADE"),
                                                 nullable=True)
    state: Mapped[str] = mapped_column(String(16), default="pending")
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    next_attempt_at: Mapped[datetime] = mapped_column(UTCDateTime)
    last_status: Mapped[int | None] = mapped_column(Integer, nullable=True)
    last_error: Mapped[str | None] = mapped_column(Text, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    delivered_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)


class EventFeed(Base):
    """Where a feed of events (``mqtt``: the events topics) stands: the last event published
    and who holds the lease to publish the next ones (one process at a time; a lease that
    runs out passes to another)."""

    __tablename__ = "event_feed"

    name: Mapped[str] = mapped_column(String(32), primary_key=True)
    last_event_pk: Mapped[int] = mapped_column(BigInteger)
    lease_owner: Mapped[str | None] = mapped_column(String(64), nullable=True)
    lease_until: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
