"""Channels: create, read, list, change settings."""

from __future__ import annotations

from typing import Any

from sqlalchemy.exc import IntegrityError

from ..core import ChannelModel, ConfigError
from ..errors import ChannelExists, ChannelNotFound, ImmutableField, InvalidRequest
from ..store import Repository
from ..store.tables import Channel, ChannelState
from .models import read_model, save_model, summary_columns, write_model
from .paging import Page, decode_cursor, encode_cursor

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
        "last_sample_at": st.last_sample_at,
        "created_at": ch.created_at,
    })
    return out


def create(repo: Repository, body: dict[str, Any], key_id: str) -> dict[str, Any]:
    try:
        model = ChannelModel.from_config(body)
    except ConfigError as exc:
        raise InvalidRequest(exc.message, details={"field": exc.field}) from exc
    config = model.config
    channel_id = config.get("id")
    if not channel_id:
        raise InvalidRequest("id is required", details={"field": "id"})
    if repo.get_channel(channel_id) is not None:
        raise ChannelExists(f"channel {channel_id!r} exists already")
    try:
        ch, st = repo.create_channel(channel_id, config, model.to_state(), summary_columns(model))
    except IntegrityError as exc:  # a concurrent create of the same id
        raise ChannelExists(f"channel {channel_id!r} exists already") from exc
    repo.insert_events([{"channel_pk": ch.pk, "kind": "channel_created", "version": 0, "key_id": key_id,
                         "details": {"config": config}}])
    return view(ch, st, model)


def get(repo: Repository, channel_id: str) -> dict[str, Any]:
    ch, st = load(repo, channel_id)
    return view(ch, st, read_model(repo, st))


def list_(repo: Repository, *, prefix: str | None, state: str | None, cursor: str | None,
          limit: int) -> Page:
    if state is not None and state not in STATES:
        raise InvalidRequest(f"state must be one of {', '.join(sorted(STATES))}", details={"field": "state"})
    after = decode_cursor(cursor)
    rows = repo.list_channels(prefix=prefix, state=state, after_pk=after, limit=limit + 1)
    items = [view(ch, st, read_model(repo, st)) for ch, st in rows[:limit]]
    nxt = encode_cursor(rows[limit - 1][0].pk) if len(rows) > limit else None
    return Page(items, nxt)


def patch(repo: Repository, channel_id: str, changes: dict[str, Any], key_id: str) -> dict[str, Any]:
    ch, st = load(repo, channel_id, lock=True)
    model = write_model(repo, st)
    merged = dict(changes)
    for section, kind_key in (("learner", "kind"), ("drift", "detector")):
        if isinstance(changes.get(section), dict):
            old = model.config[section]
            new = changes[section]
            if new.get(kind_key, old[kind_key]) == old[kind_key]:
                base = {k: v for k, v in old.items() if k != "schedule"} if "schedule" in new else old
                merged[section] = {**base, **new}
    try:
        updated = model.with_settings(merged)
    except ConfigError as exc:
        if exc.field == "immutable":
            raise ImmutableField(exc.message) from exc
        raise InvalidRequest(exc.message, details={"field": exc.field}) from exc
    version = st.version + 1
    repo.save_config(ch, updated.config)
    save_model(repo, st, updated, version)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "settings_changed", "version": version,
                         "key_id": key_id, "details": {"changes": changes, "config": updated.config}}])
    return view(ch, st, updated)
