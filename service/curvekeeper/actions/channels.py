"""Channels: create, read, list, change settings; archive and unarchive."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from typing import Any

from pydantic import ValidationError
from sqlalchemy.exc import IntegrityError

from ..channel_config import ChannelConfig, NewChannel, warnings_for
from ..core import ChannelModel, ConfigError
from ..core.config import MUTABLE
from ..core.conformity import due_on, due_state
from ..errors import (
    AlreadyArchived,
    ChannelArchived,
    ChannelExists,
    ChannelNotFound,
    ImmutableField,
    InvalidConfig,
    InvalidRequest,
    NotArchived,
    StateDamaged,
)
from ..store import Repository
from ..store.tables import Channel, ChannelState, utcnow
from . import stale
from .paging import Page, decode_cursor, encode_cursor
from .trace import of_channel, of_points
from .unit import Unit, summary_columns

#: the ``state`` filter of the list: the drift watch's states, the tolerance check's,
#: ``out_of_service``, ``stale`` (silent for 3 expected intervals) and ``damaged`` (a stored
#: state that cannot be restored)
STATES = {"ok", "warning", "alarm", "out_of_tolerance", "out_of_service", "stale", "damaged"}
DAMAGED = "damaged"
#: the ``archived`` filter of the list: live channels only (the default), all, or archived only
ARCHIVED = ("exclude", "include", "only")
#: the ``due_state`` filter of the list
DUE_STATES = {"due_soon", "overdue"}


def refuse_archived(ch: Channel) -> None:
    """Raise ``ChannelArchived`` for an archived channel: it takes no samples nor changes."""
    if ch.archived_at is not None:
        raise ChannelArchived(f"channel {ch.id!r} is archived: its history can be read, but it takes no samples "
                              "nor changes; unarchive it first", details={"archived_at": ch.archived_at.isoformat()})


def load(repo: Repository, channel_id: str, *, lock: bool = False, archived_ok: bool = False
         ) -> tuple[Channel, ChannelState]:
    """The channel and its state row. ``lock`` is for a change: it takes the row lock, and
    refuses an archived channel (``ChannelArchived``) unless ``archived_ok``."""
    found = repo.channel_and_state(channel_id, lock=lock)
    if found is None:
        raise ChannelNotFound(f"no channel {channel_id!r}")
    if lock and not archived_ok:
        refuse_archived(found[0])
    return found


def due_columns(config: dict[str, Any], last: datetime | None) -> dict[str, Any]:
    """The state row's due-date columns for a channel last calibrated at ``last``."""
    if last is None:
        return {"last_calibrated_at": None, "due_on": None, "due_soon_on": None}
    due = due_on(last.astimezone(UTC).date(), config["recalibration_interval_days"])
    return {"last_calibrated_at": last, "due_on": due, "due_soon_on": due - timedelta(days=config["due_soon_days"])}


def refresh_due(repo: Repository, st: ChannelState, config: dict[str, Any], last: datetime | None) -> None:
    """Set the due-date columns after a calibration at ``last`` or a change of settings."""
    cols = due_columns(config, last)
    if (st.last_calibrated_at, st.due_on, st.due_soon_on) != tuple(cols.values()):
        if cols["due_on"] != st.due_on:  # a new due date: the due watch tells it again
            cols["due_noticed"] = None
        repo.save_due(st, **cols)


def due(config: dict[str, Any], st: ChannelState, today: date | None = None) -> dict[str, Any]:
    """``due_on`` (null: never calibrated) and ``due_state`` as a channel answers them."""
    today = today or datetime.now(UTC).date()
    return {"due_on": st.due_on, "due_state": due_state(st.due_on, today, config["due_soon_days"]),
            "last_calibrated_at": st.last_calibrated_at}


def view(ch: Channel, st: ChannelState, model: ChannelModel, forecast: dict[str, Any] | None,
         now: datetime | None = None) -> dict[str, Any]:
    """Config plus summary, as ``GET /v1/channels/{id}`` answers it, with the ``forecast``
    of when it leaves tolerance (``trace.of_channel``); stale or not at ``now``."""
    s = model.summary()
    out = dict(ch.config)
    out.update({
        "id": ch.id,
        "n_samples": st.n_samples,
        "n_rejected": st.n_rejected,
        "rmse": s["rmse"],
        "residual_sd": s["residual_sd"],
        "residual_sd_output": s["residual_sd_output"],
        "operating_range": s["operating_range"],
        "drift": {**ch.config["drift"], **s["drift"]},
        "version": st.version,
        "service_state": model.service,
        "calibrated": model.calibrated,
        "last_sample_at": st.last_sample_at,
        "created_at": ch.created_at,
        "archived": ch.archived_at is not None,
        "archived_at": ch.archived_at,
        "forecast": forecast,
    })
    out.update(stale.status(st, now or utcnow()))
    out.update(due(ch.config, st))
    return out


def validated(body: ChannelConfig | dict[str, Any], model: type[ChannelConfig] = ChannelConfig) -> dict[str, Any]:
    """The channel configuration as the store keeps it; raises ``InvalidConfig`` naming the field.
    ``NewChannel`` checks a new channel (units required); ``ChannelConfig`` a stored one
    after a PATCH (a channel stored without units keeps working)."""
    if isinstance(body, model):
        return body.model_dump(mode="json")
    try:
        return model.model_validate(body).model_dump(mode="json")
    except ValidationError as exc:
        raise InvalidConfig.from_errors(exc.errors()) from exc


def create(repo: Repository, body: NewChannel | dict[str, Any], key_id: str, now: datetime | None = None
           ) -> dict[str, Any]:
    """The new channel as ``GET`` answers it, with ``warnings``: what its settings allow but
    a person should know (e.g. a polynomial degree above 7). Its silence watch starts ``now``."""
    now = now or utcnow()
    config = validated(body, NewChannel)
    model = ChannelModel.from_config(config)
    channel_id = config["id"]
    if repo.get_channel(channel_id) is not None:
        raise ChannelExists(f"channel {channel_id!r} exists already")
    try:
        ch, st = repo.create_channel(channel_id, config, model.to_state(),
                                     {**summary_columns(model), "silent_since": now,
                                      "stale_after": stale.deadline(config, now)})
    except IntegrityError as exc:  # a concurrent create of the same id
        raise ChannelExists(f"channel {channel_id!r} exists already") from exc
    repo.insert_events([{"channel_pk": ch.pk, "kind": "channel_created", "version": 0, "key_id": key_id,
                         "details": {"config": config}}])
    return {**view(ch, st, model, None, now), "warnings": warnings_for(config)}


def get(unit: Unit, channel_id: str) -> dict[str, Any]:
    repo = unit.repo
    ch, st = load(repo, channel_id)
    return view(ch, st, unit.read_model(st), of_channel(repo, ch.pk, ch.config), unit.now())


def damaged_item(ch: Channel, st: ChannelState, error: StateDamaged) -> dict[str, Any]:
    """A list item for a channel whose stored state cannot be restored: what the channel and
    state rows say, and the error its own routes answer with."""
    return {"id": ch.id, "state": DAMAGED, "error": {"code": error.code, "message": error.message},
            "n_samples": st.n_samples, "n_rejected": st.n_rejected, "version": st.version,
            "last_sample_at": st.last_sample_at, "created_at": ch.created_at,
            "archived": ch.archived_at is not None, "archived_at": ch.archived_at}


def list_(unit: Unit, *, prefix: str | None, state: str | None, cursor: str | None,
          limit: int, archived: str = "exclude", due_state: str | None = None) -> Page:
    """A page of channels by creation order; archived ones only with ``archived`` "include"
    or "only"; ``due_state`` keeps the channels due soon or overdue. A channel whose stored state cannot be restored
    is listed as ``damaged`` (only under the ``damaged`` filter, or none), so one damaged
    channel never breaks the fleet's list. The filters on the drift and tolerance states
    go to the store; ``damaged`` is known only by restoring each state (most are cached).
    ``due_state`` (``due_soon``, ``overdue``) keeps the channels in that state today (UTC)."""
    repo = unit.repo
    if state is not None and state not in STATES:
        raise InvalidRequest(f"state must be one of {', '.join(sorted(STATES))}", details={"field": "state"})
    if archived not in ARCHIVED:
        raise InvalidRequest(f"archived must be one of {', '.join(ARCHIVED)}", details={"field": "archived"})
    if due_state is not None and due_state not in DUE_STATES:
        raise InvalidRequest(f"due_state must be one of {', '.join(sorted(DUE_STATES))}",
                             details={"field": "due_state"})
    now = unit.now()
    today = now.date()
    after = decode_cursor(cursor)
    items: list[dict[str, Any]] = []
    while True:
        rows = repo.list_channels(prefix=prefix, state=None if state == DAMAGED else state, after_pk=after,
                                  limit=limit + 1, archived=archived, due_state=due_state, today=today, now=now)
        traces = repo.traces([ch.pk for ch, _ in rows])
        for ch, st in rows:
            if len(items) == limit and state is None:  # every row is listed: this one opens the next page
                return Page(items, None if after is None else encode_cursor(after))
            try:
                item = view(ch, st, unit.read_model(st), of_points(traces[ch.pk], ch.config), now)
            except StateDamaged as exc:
                item = damaged_item(ch, st, exc)
            if state is None or (item.get("state") == DAMAGED) == (state == DAMAGED):
                if len(items) == limit:
                    return Page(items, None if after is None else encode_cursor(after))
                items.append(item)
            after = ch.pk
        if len(rows) <= limit:
            return Page(items, None)


def merge(config: dict[str, Any], changes: dict[str, Any]) -> dict[str, Any]:
    """The settings after a PATCH: a learner of the same kind (or the same detector) is merged
    field by field (a new schedule replaces the old one), another kind replaces it; other
    fields are replaced."""
    merged = {**config, **changes}
    for section, kind_key in (("learner", "kind"), ("drift", "detector")):
        new = changes.get(section)
        if isinstance(new, dict):
            old = config[section]
            if new.get(kind_key, old[kind_key]) == old[kind_key]:
                merged[section] = {**old, **new}
    return merged


def merge_inputs(stored: list[dict[str, Any]], given: list[Any] | None) -> list[dict[str, Any]]:
    """The inputs after a PATCH: one object per stored input, in order, of which only
    ``operating_range`` may differ; raises ``ImmutableField`` for any other change."""
    if given is None or len(given) != len(stored):
        raise ImmutableField(f"the channel has {len(stored)} input(s): inputs cannot be added or removed; "
                             "give one object per input", details={"fields": ["inputs"]})
    out = []
    for i, (old, new) in enumerate(zip(stored, given, strict=True)):
        if not isinstance(new, dict):
            raise InvalidRequest(f"inputs[{i}] must be an object (e.g. {{\"operating_range\": [lo, hi]}})",
                                 details={"field": f"inputs.{i}"})
        fixed = sorted(k for k in new if k != "operating_range" and new[k] != old.get(k))
        if fixed:
            names = [f"inputs.{i}.{k}" for k in fixed]
            raise ImmutableField(f"{', '.join(names)} cannot change after creation (of an input, only "
                                 "operating_range can); create a new channel", details={"fields": names})
        out.append({**old, **{k: v for k, v in new.items() if k == "operating_range"}})
    return out


def patch(unit: Unit, channel_id: str, changes: dict[str, Any], key_id: str) -> dict[str, Any]:
    """The channel after changing its ``MUTABLE`` settings and its inputs' operating ranges."""
    repo = unit.repo
    ch, st = load(repo, channel_id, lock=True)
    fixed = sorted(set(changes) - MUTABLE - {"inputs"})
    if fixed:
        raise ImmutableField(f"{', '.join(fixed)} cannot change after creation; create a new channel",
                             details={"fields": fixed})
    model = unit.write_model(st)
    if "inputs" in changes:
        changes = {**changes, "inputs": merge_inputs(model.config["inputs"], changes["inputs"])}
    config = validated(merge(model.config, changes))
    try:
        updated = model.with_settings(config)
    except ConfigError as exc:  # a setting outside MUTABLE differs after validation
        raise ImmutableField(exc.message) from exc
    version = st.version + 1
    repo.save_config(ch, config)
    unit.save_model(st, updated, version)
    refresh_due(repo, st, config, st.last_calibrated_at)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "settings_changed", "version": version,
                         "key_id": key_id, "details": {"changes": changes, "config": config}}])
    now = unit.now()
    if config.get("expected_interval") != model.config.get("expected_interval"):
        stale.rewatch(repo, st, config, now, reason="settings_changed", key_id=key_id)
    return view(ch, st, updated, of_channel(repo, ch.pk, config), now)


def set_archived(repo: Repository, channel_id: str, archive: bool, note: str | None, key_id: str | None,
                 now: datetime | None = None) -> tuple[Channel, ChannelState]:
    """Archive a live channel (its history stays, it takes no samples nor changes, it is not
    watched for silence) or unarchive an archived one (watched again from ``now``), with an
    ``archived`` / ``unarchived`` event. The learned state is not touched, so the version
    stays. Raises ``AlreadyArchived`` / ``NotArchived``."""
    ch, st = load(repo, channel_id, lock=True, archived_ok=True)
    if archive and ch.archived_at is not None:
        raise AlreadyArchived(f"channel {channel_id!r} is archived already (since {ch.archived_at.isoformat()})",
                              details={"archived_at": ch.archived_at.isoformat()})
    if not archive and ch.archived_at is None:
        raise NotArchived(f"channel {channel_id!r} is not archived", details={"archived_at": None})
    repo.set_archived(ch, archive)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "archived" if archive else "unarchived", "version": st.version,
                         "key_id": key_id, "details": {"note": note}}])
    now = now or utcnow()
    stale.rewatch(repo, st, ch.config, now, reason="archived" if archive else "unarchived", key_id=key_id,
                  silent_since=None if archive else now, archived=archive)
    return ch, st
