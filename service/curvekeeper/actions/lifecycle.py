"""A channel's lifecycle: acknowledge a drift warning or alarm, take it out of service
and back (each a new state version with an event, so a replay repeats it); archive and
unarchive it (an event; the learned state and its version stay)."""

from __future__ import annotations

import math
from typing import Any

from ..errors import NothingToAcknowledge, ServiceUnchanged
from .channels import load, set_archived, view
from .trace import of_channel
from .unit import Unit


def acknowledge(unit: Unit, channel_id: str, note: str, key_id: str | None) -> dict[str, Any]:
    """Clear the drift warning or alarm (the watch restarts); the event keeps the note and
    what was cleared. Raises ``NothingToAcknowledge`` when the drift state is ``ok``."""
    repo = unit.repo
    ch, st = load(repo, channel_id, lock=True)
    model = unit.write_model(st)
    state, statistic = model.drift_state, model.drift_statistic
    if state == "ok":
        raise NothingToAcknowledge(f"channel {channel_id!r} has no drift warning or alarm to acknowledge",
                                   details={"drift_state": state})
    model.acknowledge()
    version = st.version + 1
    unit.save_model(st, model, version)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "acknowledged", "version": version, "key_id": key_id,
                         "details": {"note": note, "drift_state": state,
                                     "statistic": statistic if math.isfinite(statistic) else None}}])
    return view(ch, st, model, of_channel(repo, ch.pk, ch.config), unit.now())


def set_service(unit: Unit, channel_id: str, state: str, note: str, key_id: str | None) -> dict[str, Any]:
    """Take the channel out of service (samples are stored, not learned) or back in.
    Raises ``ServiceUnchanged`` when it is in that state already."""
    repo = unit.repo
    ch, st = load(repo, channel_id, lock=True)
    model = unit.write_model(st)
    was = model.service
    if was == state:
        raise ServiceUnchanged(f"channel {channel_id!r} is {state.replace('_', ' ')} already",
                               details={"service_state": was})
    model.set_service(state)
    version = st.version + 1
    unit.save_model(st, model, version)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "service_changed", "version": version, "key_id": key_id,
                         "details": {"from": was, "to": state, "note": note}}])
    return view(ch, st, model, of_channel(repo, ch.pk, ch.config), unit.now())


def archive(unit: Unit, channel_id: str, archived: bool, note: str | None, key_id: str | None) -> dict[str, Any]:
    """Archive the channel (``archived``) or unarchive it; the channel as ``GET`` answers it."""
    ch, st = set_archived(unit.repo, channel_id, archived, note, key_id, unit.now())
    return view(ch, st, unit.read_model(st), of_channel(unit.repo, ch.pk, ch.config), unit.now())
