"""The repository: the only code that issues SQL. It never commits; the caller's
session scope commits or rolls back the whole request at once."""

from __future__ import annotations

import json
from collections.abc import Collection, Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime
from itertools import repeat
from typing import Any, cast

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import Table, and_, bindparam, case, func, insert, literal, select, update
from sqlalchemy.orm import Session, defer
from sqlalchemy.orm.attributes import set_committed_value

from ..webhooks import KINDS
from .keys import KeyQueries
from .outbox import OutboxQueries
from .records import RecordQueries
from .tables import (
    Channel,
    ChannelState,
    Event,
    Sample,
    Snapshot,
    Webhook,
    WebhookDelivery,
    utcnow,
)

DELIVERABLE = frozenset(KINDS)

SAMPLE_COLUMNS = ("channel_pk", "seq", "version", "source", "source_seq", "t", "received_at", "x", "y",
                  "residual", "drift_statistic", "accepted", "reason", "reference")
_SAMPLE_INSERT_SQLITE = (f"INSERT INTO sample ({', '.join(SAMPLE_COLUMNS)}) "
                         f"VALUES ({', '.join('?' for _ in SAMPLE_COLUMNS)})")
_SAMPLE_COPY_PG = f"COPY sample ({', '.join(SAMPLE_COLUMNS)}) FROM STDIN"


@dataclass
class LearningState:
    """A channel's state columns as learning reads and advances them (no ORM object)."""

    channel_pk: int
    version: int
    n_samples: int
    n_rejected: int
    last_sample_at: datetime | None
    archived_at: datetime | None = None  # the channel's: an archived channel learns nothing
    stale_after: datetime | None = None  # the silence watch (``ChannelState``)
    stale_since: datetime | None = None


@dataclass(frozen=True)
class SampleRows:
    """A run of samples learned in order on one channel, column by column (n samples):
    seq and version count up from ``first_seq`` and ``first_version``; ``times`` and
    ``received_at`` are aware datetimes; ``x`` is (n, d) raw inputs; ``status`` is
    "accepted" or the reason the sample was held back."""

    channel_pk: int
    first_seq: int
    first_version: int
    source: str | None
    source_seqs: list[int | None] | None
    times: list[datetime]
    received_at: datetime
    x: NDArray[np.float64]
    y: list[float]
    residual: list[float | None]
    drift_statistic: list[float]
    status: list[str]
    #: per sample, the reference instrument's id it names (None: none); None: none names one
    references: list[str | None] | None = None


def _json_floats(x: list[float]) -> str:
    """JSON of a list of finite floats, as json.dumps writes it (repr of each float)."""
    return "[" + ", ".join([repr(float(v)) for v in x]) + "]"


_NULL = "\\N"  # COPY's text format: a null
_COPY_ESCAPES = str.maketrans({"\\": "\\\\", "\t": "\\t", "\n": "\\n", "\r": "\\r"})


def _copy_cell(v: str | None) -> str:
    """A text value (or null) as a field of COPY's text format."""
    return _NULL if v is None else v.translate(_COPY_ESCAPES)


def _copy_text(rows: SampleRows, xs: list[str]) -> str:
    """The rows as the text of ``COPY sample (SAMPLE_COLUMNS) FROM STDIN``: built column by
    column and joined once (psycopg's write_row formats each value in Python, ~15 us a row).
    Floats as repr (round-trips; nan and inf are PostgreSQL's too), times ISO-8601 with offset."""
    n = len(rows.y)
    iso: dict[datetime, str] = {}
    for t in rows.times:
        if t not in iso:
            iso[t] = t.isoformat()
    seqs = rows.source_seqs
    refs = rows.references
    columns: list[Iterable[str]] = [
        repeat(str(rows.channel_pk), n), map(str, range(rows.first_seq, rows.first_seq + n)),
        map(str, range(rows.first_version, rows.first_version + n)), repeat(_copy_cell(rows.source), n),
        repeat(_NULL, n) if seqs is None else [_NULL if q is None else str(q) for q in seqs],
        [iso[t] for t in rows.times], repeat(rows.received_at.isoformat(), n), xs, map(repr, rows.y),
        [_NULL if r is None else repr(r) for r in rows.residual], map(repr, rows.drift_statistic),
        ["t" if s == "accepted" else "f" for s in rows.status],
        [_NULL if s == "accepted" else _copy_cell(s) for s in rows.status],
        repeat(_NULL, n) if refs is None else [_copy_cell(r) for r in refs]]
    return "\n".join(map("\t".join, zip(*columns, strict=True))) + "\n"


def _sqlite_time(t: datetime) -> str:
    """An aware datetime in the UTC text form SQLAlchemy's SQLite DATETIME stores and reads."""
    u = t.astimezone(UTC)
    return (f"{u.year:04d}-{u.month:02d}-{u.day:02d} {u.hour:02d}:{u.minute:02d}:{u.second:02d}."
            f"{u.microsecond:06d}")


STATE_T = cast(Table, ChannelState.__table__)
_CHANNEL = (select(Channel, ChannelState)
            .join(ChannelState, ChannelState.channel_pk == Channel.pk)
            .where(Channel.id == bindparam("cid"))
            .options(defer(ChannelState.model_state, raiseload=True)))
_CHANNEL_FOR_UPDATE = _CHANNEL.with_for_update(of=ChannelState)
_STATE_UPDATES: dict[tuple[tuple[str, ...], bool], str] = {}
CHANNEL_T = cast(Table, Channel.__table__)
# what learning needs of the state row, as a plain row: cheaper than two ORM objects
_LEARNING = (select(STATE_T.c.channel_pk, STATE_T.c.version, STATE_T.c.n_samples, STATE_T.c.n_rejected,
                    STATE_T.c.last_sample_at, CHANNEL_T.c.archived_at, STATE_T.c.stale_after,
                    STATE_T.c.stale_since)
             .join_from(STATE_T, CHANNEL_T, CHANNEL_T.c.pk == STATE_T.c.channel_pk)
             .where(CHANNEL_T.c.id == bindparam("cid")))
_LEARNING_FOR_UPDATE = _LEARNING.with_for_update(of=STATE_T)
_SEEN_SQLITE = "SELECT source_seq FROM sample WHERE channel_pk = ? AND source = ? AND source_seq BETWEEN ? AND ?"
_SEEN_PG = _SEEN_SQLITE.replace("?", "%s")
SAMPLE_T = cast(Table, Sample.__table__)
SNAPSHOT_T = cast(Table, Snapshot.__table__)
# asked after every batch of a calibrated channel: a Core statement (the ORM's costs ~5x more)
EVENT_T = cast(Table, Event.__table__)
DELIVERY_T = cast(Table, WebhookDelivery.__table__)
WEBHOOK_T = cast(Table, Webhook.__table__)


class Repository(RecordQueries, KeyQueries, OutboxQueries):
    """SQL for one transaction (the caller's unit of work commits or rolls it back). Its parts
    by concern: calibration records, reference instruments and the curve trace
    (``RecordQueries``), API keys (``KeyQueries``), the webhooks' outbox and the event feed
    (``OutboxQueries``); channels, samples, snapshots and events here."""

    def __init__(self, session: Session) -> None:
        self.session = session
        self.postgres = session.get_bind().dialect.name == "postgresql"

    # channels ---------------------------------------------------------------------
    def get_channel(self, channel_id: str) -> Channel | None:
        return self.session.scalars(select(Channel).where(Channel.id == channel_id)).one_or_none()

    def channel_id(self, channel_pk: int) -> str:
        """The id of the channel with this key."""
        return self.session.scalars(select(Channel.id).where(Channel.pk == channel_pk)).one()

    def channel_and_state(self, channel_id: str, *, lock: bool = False) -> tuple[Channel, ChannelState] | None:
        """The channel with its state row; ``lock`` takes the row lock for a write
        (SELECT ... FOR UPDATE on PostgreSQL; SQLite holds the write lock already)."""
        stmt = _CHANNEL_FOR_UPDATE if lock and self.postgres else _CHANNEL
        row = self.session.execute(stmt, {"cid": channel_id}).one_or_none()
        return None if row is None else (row[0], row[1])

    def learning_state(self, channel_id: str, *, lock: bool = True) -> LearningState | None:
        """The channel's state as a plain row; ``lock`` (for learning) locks it for this
        transaction (SELECT ... FOR UPDATE on PostgreSQL; SQLite's write transaction holds
        the lock already)."""
        stmt = _LEARNING_FOR_UPDATE if lock and self.postgres else _LEARNING
        row = self.session.connection().execute(stmt, {"cid": channel_id}).first()
        return None if row is None else LearningState(*row)

    def model_state(self, channel_pk: int) -> dict[str, Any]:
        """The stored model state of a channel (not loaded with the channel row)."""
        state: dict[str, Any] = self.session.scalars(
            select(ChannelState.model_state).where(ChannelState.channel_pk == channel_pk)).one()
        return state

    def config_and_state(self, channel_pk: int) -> tuple[dict[str, Any], dict[str, Any]]:
        """A channel's configuration and stored model state, what a model is rebuilt from."""
        row = self.session.execute(
            select(Channel.config, ChannelState.model_state).join(ChannelState, ChannelState.channel_pk == Channel.pk)
            .where(Channel.pk == channel_pk)).one()
        return row[0], row[1]

    def create_channel(self, channel_id: str, config: dict[str, Any], model_state: dict[str, Any],
                       summary: dict[str, Any]) -> tuple[Channel, ChannelState]:
        ch = Channel(id=channel_id, config=config, created_at=utcnow())
        self.session.add(ch)
        self.session.flush()
        st = ChannelState(channel_pk=ch.pk, model_state=model_state, version=0, n_samples=0,
                          n_rejected=0, updated_at=utcnow(), **summary)
        self.session.add(st)
        self.session.flush()
        return ch, st

    def list_channels(self, *, prefix: str | None, state: str | None, after_pk: int | None,
                      limit: int, archived: str = "exclude", due_state: str | None = None,
                      today: date | None = None, now: datetime | None = None) -> list[tuple[Channel, ChannelState]]:
        """Channels by creation order; ``archived``: "exclude" (live only), "include", "only";
        ``due_state``: "due_soon" or "overdue" on ``today``; ``state`` "stale": stale at ``now``."""
        stmt = (select(Channel, ChannelState)
                .join(ChannelState, ChannelState.channel_pk == Channel.pk)
                .options(defer(ChannelState.model_state, raiseload=True))
                .order_by(Channel.pk).limit(limit))
        if prefix:
            stmt = stmt.where(Channel.id.startswith(prefix, autoescape=True))
        if state == "out_of_tolerance":
            stmt = stmt.where(ChannelState.tolerance_state == "out_of_tolerance")
        elif state == "stale":
            stmt = stmt.where(ChannelState.stale_after <= (now or utcnow()))
        elif state == "out_of_service":
            stmt = stmt.where(ChannelState.service_state == state)
        elif state:
            stmt = stmt.where(ChannelState.drift_state == state)
        if archived == "exclude":
            stmt = stmt.where(Channel.archived_at.is_(None))
        elif archived == "only":
            stmt = stmt.where(Channel.archived_at.is_not(None))
        if due_state == "overdue":
            stmt = stmt.where(ChannelState.due_on < today)
        elif due_state == "due_soon":
            stmt = stmt.where(ChannelState.due_soon_on <= today, ChannelState.due_on >= today)
        if after_pk is not None:
            stmt = stmt.where(Channel.pk > after_pk)
        return [(r[0], r[1]) for r in self.session.execute(stmt)]

    def set_archived(self, ch: Channel, archived: bool) -> None:
        """Archive the channel now, or unarchive it."""
        ch.archived_at = utcnow() if archived else None
        self.session.flush()

    def save_state(self, st: ChannelState | LearningState, **values: Any) -> None:
        """One UPDATE of the state row, on the driver (it runs for every request that
        learns); ``st`` shows the new values afterwards."""
        values["updated_at"] = utcnow()
        names = tuple(sorted(values))
        sql = _STATE_UPDATES.get((names, self.postgres))
        if sql is None:
            mark = "%s" if self.postgres else "?"
            sets = ", ".join(f"{n} = {mark}::json" if n == "model_state" and self.postgres else f"{n} = {mark}"
                             for n in names)
            sql = _STATE_UPDATES[(names, self.postgres)] = f"UPDATE channel_state SET {sets} WHERE channel_pk = {mark}"
        params = tuple(self._driver_value(values[n]) if n != "model_state" else json.dumps(values[n]) for n in names)
        self.session.connection().exec_driver_sql(sql, (*params, st.channel_pk))
        for name, value in values.items():
            if isinstance(st, LearningState):
                if hasattr(st, name):
                    setattr(st, name, value)
            else:
                set_committed_value(st, name, value)

    def _driver_value(self, value: Any) -> Any:
        """A value as the driver takes it: aware datetimes in UTC (SQLite: the text form
        SQLAlchemy stores), everything else as is."""
        if isinstance(value, datetime):
            return value.astimezone(UTC) if self.postgres else _sqlite_time(value)
        return value

    def save_config(self, ch: Channel, config: dict[str, Any]) -> None:
        ch.config = config
        self.session.flush()

    def save_due(self, st: ChannelState | LearningState, **values: datetime | date | str | None) -> None:
        """The state row's due-date columns (``last_calibrated_at``, ``due_on``,
        ``due_soon_on``, ``due_noticed``), or its silence watch's (``silent_since``, ``stale_after``,
        ``stale_since``); ``st`` shows them afterwards."""
        self.session.execute(update(ChannelState).where(ChannelState.channel_pk == st.channel_pk).values(**values))
        for name, value in values.items():
            if isinstance(st, LearningState):
                setattr(st, name, value)
            else:
                set_committed_value(st, name, value)

    def mark_stale(self, now: datetime, limit: int) -> list[tuple[int, datetime | None, int, datetime | None]]:
        """Set ``stale_since`` on up to ``limit`` channels stale at ``now`` whose ``stale``
        event is not written yet; (channel_pk, stale_after, version, silent_since) of each row
        this call changed. One conditional UPDATE: of two processes sweeping at once on
        PostgreSQL, the second waits for the first's row locks, then finds ``stale_since``
        set and changes nothing, so each silence is marked once."""
        due = (select(ChannelState.channel_pk).where(ChannelState.stale_after <= now,
                                                     ChannelState.stale_since.is_(None))
               .order_by(ChannelState.channel_pk).limit(limit).scalar_subquery())
        stmt = (update(ChannelState).where(ChannelState.channel_pk.in_(due), ChannelState.stale_after <= now,
                                           ChannelState.stale_since.is_(None))
                .values(stale_since=ChannelState.stale_after)
                .returning(ChannelState.channel_pk, ChannelState.stale_after, ChannelState.version,
                           ChannelState.silent_since)
                .execution_options(synchronize_session=False))
        return [(r[0], r[1], r[2], r[3]) for r in self.session.execute(stmt)]

    def mark_due(self, today: date, limit: int) -> list[tuple[int, str, date, int]]:
        """Mark up to ``limit`` live channels whose calibration is ``overdue`` on ``today``
        (``due_on`` passed) or ``due_soon`` (from ``due_soon_on``) and not yet noticed so
        for their current due date; (channel_pk, mark, due_on, version) of each row changed.
        Conditional UPDATEs, as ``mark_stale``: each due date is marked once per state."""
        live = select(Channel.pk).where(Channel.archived_at.is_(None))
        out: list[tuple[int, str, date, int]] = []
        for mark, when in (("overdue", (ChannelState.due_on < today,
                                        func.coalesce(ChannelState.due_noticed, "") != "overdue")),
                           ("due_soon", (ChannelState.due_soon_on <= today, ChannelState.due_on >= today,
                                         ChannelState.due_noticed.is_(None)))):
            if len(out) >= limit:
                break
            pks = (select(ChannelState.channel_pk).where(ChannelState.channel_pk.in_(live), *when)
                   .order_by(ChannelState.channel_pk).limit(limit - len(out)).scalar_subquery())
            stmt = (update(ChannelState).where(ChannelState.channel_pk.in_(pks), *when).values(due_noticed=mark)
                    .returning(ChannelState.channel_pk, ChannelState.due_on, ChannelState.version)
                    .execution_options(synchronize_session=False))
            out += [(r[0], mark, cast(date, r[1]), r[2])  # due_on is set: the WHERE compares it
                    for r in self.session.execute(stmt)]
        return out

    def count_states(self, now: datetime, today: date, damaged: Collection[int] = ()) -> dict[str, int]:
        """Channels by state in one query: live ones under each state that applies (drift
        ok / warning / alarm, out_of_tolerance, out_of_service, stale at ``now``, overdue on
        ``today``, and ``damaged`` among the given pks), archived ones under archived only."""
        live = Channel.archived_at.is_(None)

        def n(*when: Any) -> Any:
            return func.coalesce(func.sum(case((and_(*when), 1), else_=0)), 0)

        cols = {"ok": n(live, ChannelState.drift_state == "ok"),
                "warning": n(live, ChannelState.drift_state == "warning"),
                "alarm": n(live, ChannelState.drift_state == "alarm"),
                "out_of_tolerance": n(live, ChannelState.tolerance_state == "out_of_tolerance"),
                "out_of_service": n(live, ChannelState.service_state == "out_of_service"),
                "stale": n(live, ChannelState.stale_after <= now),
                "overdue": n(live, ChannelState.due_on < today),
                "archived": n(Channel.archived_at.is_not(None)),
                "damaged": n(live, ChannelState.channel_pk.in_(sorted(damaged))) if damaged else literal(0)}
        row = self.session.execute(select(*cols.values()).select_from(Channel)
                                   .join(ChannelState, ChannelState.channel_pk == Channel.pk)).one()
        return {name: int(v or 0) for name, v in zip(cols, row, strict=True)}

    def versions(self, channel_pks: Collection[int]) -> dict[int, int]:
        """The current version of each of these channels (the missing ones are gone)."""
        if not channel_pks:
            return {}
        rows = self.session.execute(select(ChannelState.channel_pk, ChannelState.version)
                                    .where(ChannelState.channel_pk.in_(sorted(channel_pks))))
        return {pk: v for pk, v in rows}

    # samples ----------------------------------------------------------------------
    def seen_source_seqs(self, channel_pk: int, source: str, seqs: Sequence[int] | NDArray[np.int64]) -> set[int]:
        """Which of ``seqs`` this source has stored on this channel already (one range query
        on the unique index; sources number their samples upwards, so the range is tight)."""
        wanted = set(seqs.tolist() if isinstance(seqs, np.ndarray) else seqs)
        rows = self.session.connection().exec_driver_sql(_SEEN_PG if self.postgres else _SEEN_SQLITE,
                                                         (channel_pk, source, min(wanted), max(wanted)))
        return {s for (s,) in rows if s in wanted}

    def insert_samples(self, rows: SampleRows) -> None:
        """Append a run of samples with consecutive seq and version numbers, in one statement
        on the driver with the columns zipped together, skipping per-value type processing
        (which costs more than the insert itself for large batches): an executemany on SQLite,
        a COPY on PostgreSQL (psycopg's executemany sends one INSERT a row: ~45 us a sample
        against ~3 us)."""
        n = len(rows.y)
        if n == 0:
            return
        X = rows.x
        xs = ([f"[{v!r}]" for v in X[:, 0].tolist()] if X.shape[1] == 1 else [_json_floats(r) for r in X.tolist()])
        if self.postgres:
            driver = self.session.connection().connection.driver_connection
            assert driver is not None  # a live connection's psycopg connection
            with driver.cursor() as cur, cur.copy(_SAMPLE_COPY_PG) as copy:
                copy.write(_copy_text(rows, xs))
            return
        accepted = [s == "accepted" for s in rows.status]
        reasons = [None if s == "accepted" else s for s in rows.status]
        seqs = rows.source_seqs if rows.source_seqs is not None else repeat(None, n)
        refs = rows.references if rows.references is not None else repeat(None, n)
        text: dict[datetime, str] = {}
        for t in rows.times:
            if t not in text:
                text[t] = _sqlite_time(t)
        times, received = [text[t] for t in rows.times], _sqlite_time(rows.received_at)
        params = list(zip(repeat(rows.channel_pk, n), range(rows.first_seq, rows.first_seq + n),
                          range(rows.first_version, rows.first_version + n), repeat(rows.source, n), seqs, times,
                          repeat(received, n), xs, rows.y, rows.residual, rows.drift_statistic, accepted, reasons,
                          refs, strict=False))
        self.session.connection().exec_driver_sql(_SAMPLE_INSERT_SQLITE, params)

    def list_samples(self, channel_pk: int, *, after_seq: int | None, limit: int) -> Sequence[Sample]:
        stmt = select(Sample).where(Sample.channel_pk == channel_pk).order_by(Sample.seq).limit(limit)
        if after_seq is not None:
            stmt = stmt.where(Sample.seq > after_seq)
        return self.session.scalars(stmt).all()

    def history(self, channel_pk: int, *, since: datetime | None, until: datetime | None,
                last: int | None, max_seq: int, limit: int) -> Sequence[Sample]:
        """Accepted samples up to ``max_seq`` for a fit, oldest first; ``last`` keeps only
        the newest N. Samples are append-only, so the same arguments give the same rows."""
        stmt = select(Sample).where(Sample.channel_pk == channel_pk, Sample.accepted.is_(True),
                                    Sample.seq <= max_seq)
        if since is not None:
            stmt = stmt.where(Sample.t >= since)
        if until is not None:
            stmt = stmt.where(Sample.t <= until)
        if last is not None:
            newest = list(self.session.scalars(stmt.order_by(Sample.seq.desc()).limit(last)))
            return newest[::-1]
        return list(self.session.scalars(stmt.order_by(Sample.seq).limit(limit)))

    # snapshots ----------------------------------------------------------------------
    def insert_snapshot(self, channel_pk: int, *, reason: str, label: str | None, config: dict[str, Any],
                        model_state: dict[str, Any], version: int, n_samples: int) -> Snapshot:
        snap = Snapshot(channel_pk=channel_pk, reason=reason, label=label, config=config, model_state=model_state,
                        version=version, n_samples=n_samples, created_at=utcnow())
        self.session.add(snap)
        self.session.flush()
        return snap

    def insert_snapshots(self, channel_pk: int, *, reason: str, config: dict[str, Any],
                         snaps: Sequence[tuple[int, int, dict[str, Any]]]) -> None:
        """Snapshots of one reason and configuration, (version, n_samples, model_state) each,
        in one executemany (a batch of 10,000 samples takes 10 periodic snapshots)."""
        if not snaps:
            return
        now = utcnow()
        self.session.connection().execute(insert(SNAPSHOT_T), [
            {"channel_pk": channel_pk, "reason": reason, "label": None, "config": config, "model_state": state,
             "version": version, "n_samples": n, "created_at": now} for version, n, state in snaps])

    def get_snapshot(self, channel_pk: int, snapshot_pk: int) -> Snapshot | None:
        return self.session.scalars(select(Snapshot).where(Snapshot.channel_pk == channel_pk,
                                                           Snapshot.pk == snapshot_pk)).one_or_none()

    def calibration_snapshot(self, channel_pk: int, version: int) -> Snapshot | None:
        """The snapshot a calibration took of the curve it left (reason "calibration", that version)."""
        return self.session.scalars(select(Snapshot).where(
            Snapshot.channel_pk == channel_pk, Snapshot.reason == "calibration", Snapshot.version == version)
            .order_by(Snapshot.pk.desc()).limit(1)).one_or_none()

    def list_snapshots(self, channel_pk: int, *, after_pk: int | None, limit: int) -> Sequence[Snapshot]:
        stmt = select(Snapshot).where(Snapshot.channel_pk == channel_pk).order_by(Snapshot.pk).limit(limit)
        if after_pk is not None:
            stmt = stmt.where(Snapshot.pk > after_pk)
        return self.session.scalars(stmt).all()

    def samples_after_seq(self, channel_pk: int, *, after_seq: int, limit: int) -> list[Sample]:
        """Stored samples after the channel's ``after_seq``-th, in order (for replay; seq and
        version grow together, so these are the samples learned after that point)."""
        stmt = (select(Sample).where(Sample.channel_pk == channel_pk, Sample.seq > after_seq)
                .order_by(Sample.seq).limit(limit))
        return list(self.session.scalars(stmt))

    # events ---------------------------------------------------------------------------
    def first_event(self, channel_pk: int, kind: str) -> Event | None:
        return self.session.scalars(select(Event).where(Event.channel_pk == channel_pk, Event.kind == kind)
                                    .order_by(Event.pk).limit(1)).one_or_none()

    def last_event(self, channel_pk: int, kinds: Sequence[str]) -> Event | None:
        """The channel's newest event of these kinds."""
        return self.session.scalars(select(Event).where(Event.channel_pk == channel_pk, Event.kind.in_(kinds))
                                    .order_by(Event.pk.desc()).limit(1)).one_or_none()

    def state_events(self, channel_pk: int, *, after_version: int, kinds: Sequence[str]) -> list[Event]:
        """Events of the given kinds after a version, in version order (for replay)."""
        stmt = (select(Event).where(Event.channel_pk == channel_pk, Event.kind.in_(kinds),
                                    Event.version > after_version).order_by(Event.version, Event.pk))
        return list(self.session.scalars(stmt))

    def insert_events(self, rows: Iterable[dict[str, Any]]) -> None:
        """Insert events and, in the same transaction, the pending webhook deliveries of
        those a webhook asked for (the outbox: this is the one place events are written)."""
        rows = [{"at": utcnow(), **r} for r in rows]
        if not rows:
            return
        conn = self.session.connection()
        hooks = self._webhooks_wanting({r["kind"] for r in rows})
        if not hooks:
            conn.execute(insert(EVENT_T), rows)
            return
        for r in rows:
            wanted = [pk for pk, kinds in hooks if r["kind"] in kinds]
            if not wanted:
                conn.execute(insert(EVENT_T), [r])
                continue
            event_pk = conn.execute(insert(EVENT_T).returning(EVENT_T.c.pk), r).scalar_one()
            conn.execute(insert(DELIVERY_T), [
                {"webhook_pk": w, "event_pk": event_pk, "state": "pending", "attempts": 0,
                 "next_attempt_at": r["at"], "created_at": r["at"]} for w in wanted])

    def _webhooks_wanting(self, kinds: set[str]) -> list[tuple[int, set[str]]]:
        """(pk, kinds) of the webhooks that ask for any of ``kinds`` (one small SELECT)."""
        if not kinds & DELIVERABLE:
            return []
        rows = self.session.connection().execute(select(WEBHOOK_T.c.pk, WEBHOOK_T.c.events))
        return [(pk, set(ev)) for pk, ev in rows if kinds & set(ev)]

    def list_events(self, channel_pk: int, *, kind: str | None, after_pk: int | None,
                    limit: int) -> Sequence[Event]:
        stmt = select(Event).where(Event.channel_pk == channel_pk).order_by(Event.pk).limit(limit)
        if kind:
            stmt = stmt.where(Event.kind == kind)
        if after_pk is not None:
            stmt = stmt.where(Event.pk > after_pk)
        return self.session.scalars(stmt).all()

    def list_all_events(self, *, kind: str | None, key_id: str | None, after_pk: int | None,
                        limit: int) -> list[tuple[Event, str | None]]:
        """Events of every channel and those of none (keys), oldest first, each with its
        channel's id (None for a key event)."""
        stmt = (select(Event, Channel.id).outerjoin(Channel, Channel.pk == Event.channel_pk)
                .order_by(Event.pk).limit(limit))
        if kind:
            stmt = stmt.where(Event.kind == kind)
        if key_id:
            stmt = stmt.where(Event.key_id == key_id)
        if after_pk is not None:
            stmt = stmt.where(Event.pk > after_pk)
        return [(r[0], r[1]) for r in self.session.execute(stmt)]

    # health and tests -------------------------------------------------------------------
    def count_rows(self, table: Any, channel_pk: int | None = None) -> int:
        """Row count of a table (optionally one channel's): used by health checks and tests."""
        stmt = select(func.count()).select_from(table)
        if channel_pk is not None:
            stmt = stmt.where(table.channel_pk == channel_pk)
        return int(self.session.scalar(stmt) or 0)

    def ping(self) -> None:
        self.session.execute(select(1))
