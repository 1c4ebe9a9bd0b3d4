"""Channels: create, read, list, change settings."""

from __future__ import annotations

from typing import Any

from pydantic import ValidationError
from sqlalchemy.exc import IntegrityError

from ..channel_config import ChannelConfig
from ..core import ChannelModel, ConfigError
from ..core.config import MUTABLE
from ..errors import ChannelExists, ChannelNotFound, ImmutableField, InvalidConfig, InvalidRequest
from ..store import Repository
from ..store.tables import Channel, ChannelState
from .paging import Page, decode_cursor, encode_cursor
from .unit import Unit, summary_columns

STATES = {"ok", "warning", "alarm", "out_of_tolerance"}


def load(repo: Repository, channel_id: str, *, lock: bool = False) -> tuple[Channel, ChannelState]:
    found = repo.channel_and_state(channel_id, lock=lock)
    if found is None:
        raise ChannelNotFound(f"no channel {channel_id!r}")
    return found


def view(ch: Channel, st: ChannelState, model: ChannelModel) -> dict[str, Any]:
    """Config plus summary, as ``GET /v1/channels/{id}`` answers it."""
    s = model.summary()
    out = dict(ch.config)
    out.update({
        "id": ch.id,
        "n_samples": st.n_samples,
        "n_rejected": st.n_rejected,
        "rmse": s["rmse"],
        "residual_sd": s["residual_sd"],
        "drift": {**ch.config["drift"], **s["drift"]},
        "version": st.version,
        "service_state": model.service,
        "last_sample_at": st.last_sample_at,
        "created_at": ch.created_at,
    })
    return out


def validated(body: ChannelConfig | dict[str, Any]) -> dict[str, Any]:
    """The channel configuration as the store keeps it; raises ``InvalidConfig`` naming the field."""
    if isinstance(body, ChannelConfig):
        return body.model_dump(mode="json")
    try:
        return ChannelConfig.model_validate(body).model_dump(mode="json")
    except ValidationError as exc:
        raise InvalidConfig.from_errors(exc.errors()) from exc


def create(repo: Repository, body: ChannelConfig | dict[str, Any], key_id: str) -> dict[str, Any]:
    config = validated(body)
    model = ChannelModel.from_config(config)
    channel_id = config["id"]
    if repo.get_channel(channel_id) is not None:
        raise ChannelExists(f"channel {channel_id!r} exists already")
    try:
        ch, st = repo.create_channel(channel_id, config, model.to_state(), summary_columns(model))
    except IntegrityError as exc:  # a concurrent create of the same id
        raise ChannelExists(f"channel {channel_id!r} exists already") from exc
    repo.insert_events([{"channel_pk": ch.pk, "kind": "channel_created", "version": 0, "key_id": key_id,
                         "details": {"config": config}}])
    return view(ch, st, model)


def get(unit: Unit, channel_id: str) -> dict[str, Any]:
    repo = unit.repo
    ch, st = load(repo, channel_id)
    return view(ch, st, unit.read_model(st))


def list_(unit: Unit, *, prefix: str | None, state: str | None, cursor: str | None,
          limit: int) -> Page:
    repo = unit.repo
    if state is not None and state not in STATES:
        raise InvalidRequest(f"state must be one of {', '.join(sorted(STATES))}", details={"field": "state"})
    after = decode_cursor(cursor)
    rows = repo.list_channels(prefix=prefix, state=state, after_pk=after, limit=limit + 1)
    items = [view(ch, st, unit.read_model(st)) for ch, st in rows[:limit]]
    nxt = encode_cursor(rows[limit - 1][0].pk) if len(rows) > limit else None
    return Page(items, nxt)


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


def patch(unit: Unit, channel_id: str, changes: dict[str, Any], key_id: str) -> dict[str, Any]:
    repo = unit.repo
    ch, st = load(repo, channel_id, lock=True)
    fixed = sorted(set(changes) - MUTABLE)
    if fixed:
        raise ImmutableField(f"{', '.join(fixed)} cannot change after creation; create a new channel",
                             details={"fields": fixed})
    model = unit.write_model(st)
    config = validated(merge(model.config, changes))
    try:
        updated = model.with_settings(config)
    except ConfigError as exc:  # a setting outside MUTABLE differs after validation
        raise ImmutableField(exc.message) from exc
    version = st.version + 1
    repo.save_config(ch, config)
    unit.save_model(st, updated, version)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "settings_changed", "version": version,
                         "key_id": key_id, "details": {"changes": changes, "config": config}}])
    return view(ch, st, updated)
