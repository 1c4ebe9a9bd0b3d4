"""Reference instruments: create, read, list, change, retire; and what samples and
calibrations ask of the one they name (it exists, is not retired, is not overdue).

The uncertainty is kept as U with k (u = U / k): a certificate's U and k as stated; a
standard uncertainty u as U = u, k = 1; the half-width a of a rectangular or triangular
distribution as U = a with k its divisor, sqrt 3 (GUM 4.3.7) or sqrt 6 (GUM 4.3.9).
"""

from __future__ import annotations

from collections.abc import Collection
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from typing import Any

from ..core.uncertainty import HALF_WIDTH_DIVISORS, from_expanded
from ..errors import (
    ImmutableField,
    InvalidRequest,
    ReferenceExists,
    ReferenceNotFound,
    ReferenceOverdue,
    ReferenceRetired,
)
from ..store import Repository
from ..store.tables import ReferenceInstrument, utcnow
from .channels import validated
from .paging import Page, decode_cursor, encode_cursor

DUE_STATES = ("ok", "due_soon", "overdue")
#: the fields that state the uncertainty; any of them in a PATCH restates it
UNCERTAINTY = ("expanded_uncertainty", "coverage_factor", "standard_uncertainty", "half_width", "distribution")
#: k when a normal U is stated without one (common practice: certificates state k = 2 for about 95 %)
DEFAULT_K = 2.0
FIXED = ("id", "unit")


def today() -> date:
    """The day, in UTC, that due states are told against."""
    return datetime.now(UTC).date()


def due_bounds(on: date, window_days: int) -> dict[str, tuple[date | None, date | None]]:
    """Per due state, the inclusive range of ``due_on`` it covers on day ``on``: overdue once
    the due day has passed, due_soon from that day to ``window_days`` ahead, ok after."""
    soon_until = on + timedelta(days=window_days)
    return {"overdue": (None, on - timedelta(days=1)), "due_soon": (on, soon_until),
            "ok": (soon_until + timedelta(days=1), None)}


def due_state(due_on: date, on: date, window_days: int) -> str:
    """``ok``, ``due_soon`` or ``overdue`` for a reference due on ``due_on``, told on day ``on``."""
    for state, (lo, hi) in due_bounds(on, window_days).items():
        if (lo is None or due_on >= lo) and (hi is None or due_on <= hi):
            return state
    raise AssertionError("the due bounds cover every day")  # pragma: no cover


def stated(fields: dict[str, Any]) -> tuple[float, float, str]:
    """(U, k, distribution) from one of the three forms (see the module docstring); raises
    ``InvalidRequest`` naming the field when the forms are mixed or none is complete."""
    dist = fields.get("distribution") or "normal"
    U, k = fields.get("expanded_uncertainty"), fields.get("coverage_factor")
    u, a = fields.get("standard_uncertainty"), fields.get("half_width")

    def bad(field: str, message: str) -> InvalidRequest:
        return InvalidRequest(f"{field}: {message}", details={"field": field})

    if dist in HALF_WIDTH_DIVISORS:
        for name, v in (("expanded_uncertainty", U), ("coverage_factor", k), ("standard_uncertainty", u)):
            if v is not None:
                raise bad(name, f"a {dist} distribution is stated by its half_width a alone")
        if a is None:
            raise bad("half_width", f"is required for a {dist} distribution")
        return float(a), HALF_WIDTH_DIVISORS[dist], dist
    if a is not None:
        raise bad("half_width", "belongs to a rectangular or triangular distribution; set distribution")
    if u is not None:
        if U is not None or k is not None:
            raise bad("standard_uncertainty", "give either u, or U with k, not both")
        return float(u), 1.0, "normal"
    if U is None:
        raise bad("expanded_uncertainty", "is required (or standard_uncertainty, or a half_width with its "
                                          "distribution)")
    return float(U), float(k if k is not None else DEFAULT_K), "normal"


def statement(ref: ReferenceInstrument) -> dict[str, Any]:
    """The stored uncertainty in the form it was stated (for merging a PATCH)."""
    if ref.distribution in HALF_WIDTH_DIVISORS:
        return {"distribution": ref.distribution, "half_width": ref.expanded_uncertainty}
    return {"distribution": "normal", "expanded_uncertainty": ref.expanded_uncertainty,
            "coverage_factor": ref.coverage_factor}


def _check_dates(calibrated_on: date, due_on: date) -> None:
    if due_on < calibrated_on:
        raise InvalidRequest(f"due_on: {due_on.isoformat()} is before calibrated_on ({calibrated_on.isoformat()})",
                             details={"field": "due_on"})


def view(ref: ReferenceInstrument, window_days: int, on: date | None = None) -> dict[str, Any]:
    """A reference as the API answers it, with its standard uncertainty and due state."""
    half = ref.distribution in HALF_WIDTH_DIVISORS
    return {"id": ref.id, "description": ref.description, "unit": ref.unit,
            "expanded_uncertainty": ref.expanded_uncertainty, "coverage_factor": ref.coverage_factor,
            "standard_uncertainty": from_expanded(ref.expanded_uncertainty, ref.coverage_factor),
            "half_width": ref.expanded_uncertainty if half else None, "distribution": ref.distribution,
            "certificate": ref.certificate, "calibrated_on": ref.calibrated_on, "due_on": ref.due_on,
            "note": ref.note, "retired": ref.retired,
            "due_state": due_state(ref.due_on, on or today(), window_days),
            "created_at": ref.created_at, "updated_at": ref.updated_at}


def _event(repo: Repository, kind: str, key_id: str | None, details: dict[str, Any]) -> None:
    repo.insert_events([{"channel_pk": None, "kind": kind, "version": None, "key_id": key_id,
                         "details": _plain(details)}])


def _plain(value: Any) -> Any:
    """JSON types only (dates as ISO text) for an event's details."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    return value.isoformat() if isinstance(value, date) else value


def create(repo: Repository, body: dict[str, Any], key_id: str, window_days: int) -> dict[str, Any]:
    """A new reference from the create body (a dict of its fields); audited."""
    U, k, dist = stated(body)
    _check_dates(body["calibrated_on"], body["due_on"])
    now = utcnow()
    ref = ReferenceInstrument(id=body["id"], description=body.get("description") or "", unit=body["unit"],
                              expanded_uncertainty=U, coverage_factor=k, distribution=dist,
                              certificate=body["certificate"], calibrated_on=body["calibrated_on"],
                              due_on=body["due_on"], note=body.get("note") or "", retired=False,
                              created_at=now, updated_at=now)
    if repo.get_reference(ref.id) is not None or not repo.insert_reference_unless_taken(ref):
        raise ReferenceExists(f"reference {ref.id!r} exists already", details={"id": ref.id})
    out = view(ref, window_days)
    _event(repo, "reference_created", key_id, {"reference": ref.id, "fields": {
        k: v for k, v in out.items() if k not in ("due_state", "created_at", "updated_at")}})
    return out


def load(repo: Repository, reference_id: str) -> ReferenceInstrument:
    ref = repo.get_reference(reference_id)
    if ref is None:
        raise ReferenceNotFound(f"no reference instrument {reference_id!r}", details={"reference": reference_id})
    return ref


def get(repo: Repository, reference_id: str, window_days: int) -> dict[str, Any]:
    return view(load(repo, reference_id), window_days)


def list_(repo: Repository, *, retired: bool | None, due: str | None, cursor: str | None, limit: int,
          window_days: int) -> Page:
    """A page of references by creation order, optionally only (not) retired ones, or those
    in one due state."""
    lo = hi = None
    on = today()
    if due is not None:
        if due not in DUE_STATES:
            raise InvalidRequest(f"due_state must be one of {', '.join(DUE_STATES)}", details={"field": "due_state"})
        lo, hi = due_bounds(on, window_days)[due]
    rows = repo.list_references(retired=retired, due_from=lo, due_until=hi, after_pk=decode_cursor(cursor),
                                limit=limit + 1)
    items = [view(r, window_days, on) for r in rows[:limit]]
    return Page(items, encode_cursor(rows[limit - 1].pk) if len(rows) > limit else None)


def patch(repo: Repository, reference_id: str, changes: dict[str, Any], key_id: str,
          window_days: int) -> dict[str, Any]:
    """Change a reference's fields, or retire it (``retired: true``, for good); audited."""
    fixed = sorted(set(changes) & set(FIXED))
    if fixed:
        raise ImmutableField(f"{', '.join(fixed)} of a reference instrument cannot change; create a new one",
                             details={"fields": fixed})
    ref = load(repo, reference_id)
    if ref.retired:
        raise ReferenceRetired(f"reference {reference_id!r} is retired; it cannot change",
                               details={"reference": reference_id})
    values = {k: v for k, v in changes.items() if k not in UNCERTAINTY}
    restated = {k: v for k, v in changes.items() if k in UNCERTAINTY}
    if restated:
        before = statement(ref)
        dist = restated.get("distribution", before["distribution"])
        # the stored figures stay unless the distribution changes or u replaces U and k
        kept = before if dist == before["distribution"] and "standard_uncertainty" not in restated else {}
        U, k, dist = stated({**kept, **restated, "distribution": dist})
        values.update({"expanded_uncertainty": U, "coverage_factor": k, "distribution": dist})
    _check_dates(values.get("calibrated_on", ref.calibrated_on), values.get("due_on", ref.due_on))
    repo.save_reference(ref, values)
    _event(repo, "reference_retired" if values.get("retired") else "reference_changed", key_id,
           {"reference": ref.id, "changes": changes})
    return view(ref, window_days)


@dataclass(frozen=True)
class ReferenceUse:
    """A reference instrument as a calibration or a sample uses it on ``on``: its standard
    uncertainty ``u`` = U / k (the reference's unit) and the facts a record names."""

    id: str
    unit: str
    expanded_uncertainty: float
    coverage_factor: float
    distribution: str
    u: float
    certificate: str
    calibrated_on: date
    due_on: date
    on: date
    overdue: bool
    allow_overdue_reference: bool

    def facts(self) -> dict[str, Any]:
        """JSON types, for an answer and an event's details."""
        return {"id": self.id, "unit": self.unit, "expanded_uncertainty": self.expanded_uncertainty,
                "coverage_factor": self.coverage_factor, "distribution": self.distribution,
                "standard_uncertainty": self.u, "certificate": self.certificate,
                "calibrated_on": self.calibrated_on.isoformat(), "due_on": self.due_on.isoformat(),
                "on": self.on.isoformat(), "overdue": self.overdue,
                "allow_overdue_reference": self.allow_overdue_reference}

    def channel_setting(self) -> dict[str, Any]:
        """The channel's ``reference`` setting this instrument gives (its U, k, distribution)."""
        return {"expanded_uncertainty": self.expanded_uncertainty, "coverage_factor": self.coverage_factor,
                "distribution": self.distribution, "instrument": self.id}


def reference_for_use(repo: Repository, reference_id: str, on: date, allow_overdue: bool) -> ReferenceUse:
    """The reference a calibration done on day ``on`` names; raises ``ReferenceNotFound``,
    ``ReferenceRetired``, or ``ReferenceOverdue`` when its due date lies before ``on``
    unless ``allow_overdue`` (the choice is kept in the answer)."""
    ref = load(repo, reference_id)
    if ref.retired:
        raise ReferenceRetired(f"reference {reference_id!r} is retired; no new calibration may name it",
                               details={"reference": reference_id})
    overdue = ref.due_on < on
    if overdue and not allow_overdue:
        raise ReferenceOverdue(
            f"reference {reference_id!r} was due on {ref.due_on.isoformat()}, before this calibration "
            f"({on.isoformat()}); recalibrate it, or set allow_overdue_reference to true (it is recorded)",
            details={"reference": reference_id, "due_on": ref.due_on.isoformat(), "on": on.isoformat()})
    return ReferenceUse(ref.id, ref.unit, ref.expanded_uncertainty, ref.coverage_factor, ref.distribution,
                        from_expanded(ref.expanded_uncertainty, ref.coverage_factor), ref.certificate,
                        ref.calibrated_on, ref.due_on, on, overdue, allow_overdue)


def use_on_channel(config: dict[str, Any], use: ReferenceUse) -> dict[str, Any]:
    """The channel's configuration with its ``reference`` setting taken from the instrument
    (so predictions count its u); refuses an instrument whose unit is not the channel's
    output unit (when both are stated)."""
    unit = config["output"].get("unit") or ""
    if unit.strip() and use.unit.strip() and unit != use.unit:
        raise InvalidRequest(f"reference: {use.id!r} states its uncertainty in {use.unit!r}, the channel's output "
                             f"is in {unit!r}", details={"field": "reference", "reference": use.id})
    return validated({**config, "reference": use.channel_setting()})


def check_named(repo: Repository, ids: Collection[str]) -> None:
    """Every reference samples name exists and is not retired; raises the first that fails
    (in id order)."""
    found = repo.references_named(ids)
    for rid in sorted(ids):
        ref = found.get(rid)
        if ref is None:
            raise ReferenceNotFound(f"no reference instrument {rid!r}", details={"reference": rid})
        if ref.retired:
            raise ReferenceRetired(f"reference {rid!r} is retired; no new sample may name it",
                                   details={"reference": rid})
