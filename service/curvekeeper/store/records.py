"""The SQL of calibration records, reference instruments and the curve trace (the forecast's
history): a part of ``Repository``."""

from __future__ import annotations

from collections.abc import Collection, Sequence
from datetime import date, datetime
from typing import Any, cast

from sqlalchemy import Table, bindparam, delete, func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, aliased

from .tables import CalibrationRecord, CurveTrace, ReferenceInstrument, utcnow

_SUCCESSOR = aliased(CalibrationRecord)
TRACE_T = cast(Table, CurveTrace.__table__)
_TRACE_SPAN = select(func.min(TRACE_T.c.t), func.max(TRACE_T.c.t)).where(TRACE_T.c.channel_pk == bindparam("pk"))


class RecordQueries:
    session: Session

    # calibration records --------------------------------------------------------------
    def insert_record(self, record: CalibrationRecord) -> CalibrationRecord:
        """Store a new record; records are never updated nor deleted (no method does)."""
        self.session.add(record)
        self.session.flush()
        return record

    def get_record(self, channel_pk: int, record_pk: int) -> tuple[CalibrationRecord, int | None] | None:
        """A channel's record with the pk of the record that supersedes it (None: none does)."""
        row = self.session.execute(
            select(CalibrationRecord, _SUCCESSOR.pk)
            .outerjoin(_SUCCESSOR, _SUCCESSOR.supersedes == CalibrationRecord.pk)
            .where(CalibrationRecord.channel_pk == channel_pk, CalibrationRecord.pk == record_pk)).one_or_none()
        return None if row is None else (row[0], row[1])

    def list_records(self, channel_pk: int, *, after_pk: int | None, limit: int
                     ) -> list[tuple[CalibrationRecord, int | None]]:
        """A channel's records, oldest stored first, each with the pk of its successor."""
        stmt = (select(CalibrationRecord, _SUCCESSOR.pk)
                .outerjoin(_SUCCESSOR, _SUCCESSOR.supersedes == CalibrationRecord.pk)
                .where(CalibrationRecord.channel_pk == channel_pk).order_by(CalibrationRecord.pk).limit(limit))
        if after_pk is not None:
            stmt = stmt.where(CalibrationRecord.pk > after_pk)
        return [(r[0], r[1]) for r in self.session.execute(stmt)]

    # reference instruments ------------------------------------------------------------
    def get_reference(self, reference_id: str) -> ReferenceInstrument | None:
        return self.session.scalars(select(ReferenceInstrument)
                                    .where(ReferenceInstrument.id == reference_id)).one_or_none()

    def references_named(self, ids: Collection[str]) -> dict[str, ReferenceInstrument]:
        """The stored references among ``ids``, by id (the unknown ones are missing)."""
        if not ids:
            return {}
        rows = self.session.scalars(select(ReferenceInstrument).where(ReferenceInstrument.id.in_(sorted(ids))))
        return {r.id: r for r in rows}

    def insert_reference_unless_taken(self, ref: ReferenceInstrument) -> bool:
        """Insert a reference in a savepoint; False (and nothing changed) when its id is taken,
        e.g. by another request at the same moment."""
        try:
            with self.session.begin_nested():
                self.session.add(ref)
        except IntegrityError:
            return False
        return True

    def list_references(self, *, retired: bool | None, due_from: date | None, due_until: date | None,
                        after_pk: int | None, limit: int) -> Sequence[ReferenceInstrument]:
        """References by creation order; ``due_from`` / ``due_until`` bound ``due_on`` (inclusive)."""
        stmt = select(ReferenceInstrument).order_by(ReferenceInstrument.pk).limit(limit)
        if retired is not None:
            stmt = stmt.where(ReferenceInstrument.retired.is_(retired))
        if due_from is not None:
            stmt = stmt.where(ReferenceInstrument.due_on >= due_from)
        if due_until is not None:
            stmt = stmt.where(ReferenceInstrument.due_on <= due_until)
        if after_pk is not None:
            stmt = stmt.where(ReferenceInstrument.pk > after_pk)
        return self.session.scalars(stmt).all()

    def save_reference(self, ref: ReferenceInstrument, values: dict[str, Any]) -> None:
        for name, value in values.items():
            setattr(ref, name, value)
        ref.updated_at = utcnow()
        self.session.flush()

    # curve trace (the forecast's history) --------------------------------------------
    def trace_span(self, channel_pk: int) -> tuple[datetime, datetime] | None:
        """Measurement times of the channel's first and latest trace points, or None."""
        first, last = self.session.connection().execute(_TRACE_SPAN, {"pk": channel_pk}).one()
        return None if first is None or last is None else (first, last)

    def insert_trace_point(self, channel_pk: int, *, t: datetime, difference: float, u: float | None,
                           version: int) -> None:
        self.session.add(CurveTrace(channel_pk=channel_pk, t=t, difference=difference, u=u, version=version))
        self.session.flush()

    def clear_trace(self, channel_pk: int, after_version: int | None = None) -> None:
        """Delete the channel's trace points; with ``after_version``, only those recorded by
        later versions of its curve."""
        stmt = delete(CurveTrace).where(CurveTrace.channel_pk == channel_pk)
        if after_version is not None:
            stmt = stmt.where(CurveTrace.version > after_version)
        self.session.execute(stmt)

    def traces(self, channel_pks: Sequence[int]) -> dict[int, list[tuple[datetime, float, float | None]]]:
        """Each channel's trace points (t, difference, u), oldest first, in one query."""
        out: dict[int, list[tuple[datetime, float, float | None]]] = {pk: [] for pk in channel_pks}
        if not out:
            return out
        stmt = (select(CurveTrace.channel_pk, CurveTrace.t, CurveTrace.difference, CurveTrace.u)
                .where(CurveTrace.channel_pk.in_(list(out))).order_by(CurveTrace.channel_pk, CurveTrace.t))
        for pk, t, d, u in self.session.execute(stmt):
            out[pk].append((t, d, u))
        return out
