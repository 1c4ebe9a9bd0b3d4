"""Snapshots and rollback."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..core import ChannelModel
from ..core.config import adopt_settings
from ..errors import SnapshotNotFound
from ..store import Repository
from ..store.tables import Snapshot
from . import stale
from .channels import load, refresh_due, view
from .paging import Page, decode_cursor, encode_cursor
from .trace import of_channel
from .unit import Unit, restore


def _item(snap: Snapshot) -> dict[str, Any]:
    return {"id": snap.pk, "reason": snap.reason, "label": snap.label, "version": snap.version,
            "n_samples": snap.n_samples, "created_at": snap.created_at}


def take(repo: Repository, channel_id: str, label: str | None, key_id: str | None) -> dict[str, Any]:
    ch, st = load(repo, channel_id, lock=True)
    snap = repo.insert_snapshot(ch.pk, reason="manual", label=label, config=ch.config,
                                model_state=repo.model_state(ch.pk), version=st.version, n_samples=st.n_samples)
    repo.insert_events([{"channel_pk": ch.pk, "kind": "snapshot", "version": st.version, "key_id": key_id,
                         "details": {"snapshot": snap.pk, "reason": "manual", "label": label}}])
    return _item(snap)


def list_(repo: Repository, channel_id: str, *, cursor: str | None, limit: int) -> Page:
    ch, _ = load(repo, channel_id)
    rows = repo.list_snapshots(ch.pk, after_pk=decode_cursor(cursor), limit=limit + 1)
    return Page([_item(s) for s in rows[:limit]],
                encode_cursor(rows[limit - 1].pk) if len(rows) > limit else None)


def difference(current: ChannelModel, other: ChannelModel, base: ChannelModel | None = None) -> dict[str, Any]:
    """The largest difference between ``other``'s curve and the current one (or ``base``'s)
    over the channel's operating range now (``ChannelModel.curve_difference``): ``max`` in
    output units, ``at`` the raw inputs where it is (a number for one input, a list for
    several), ``grid_points``, and ``left_out``, the points where either curve is not
    finite. ``max`` and ``at`` are None when the curves cannot be compared (no common
    finite point, another basis)."""
    grid_points = len(current.curve_values(current.weights))
    against = current if base is None else base
    if other.weights.shape != current.weights.shape or against.weights.shape != current.weights.shape:
        return {"max": None, "at": None, "grid_points": grid_points, "left_out": grid_points}
    largest, at, left_out = current.curve_difference(np.asarray(other.weights), np.asarray(against.weights))
    where = None if at is None else (float(at[0]) if at.size == 1 else at.tolist())
    return {"max": largest, "at": where, "grid_points": grid_points, "left_out": left_out}


def get(unit: Unit, channel_id: str, snapshot_id: int, against: int | None = None) -> dict[str, Any]:
    """One snapshot with its curve summary and its largest difference from the current
    curve; ``curve_difference`` compares it with snapshot ``against`` instead, if given."""
    repo = unit.repo
    ch, st = load(repo, channel_id)
    snaps: dict[int, Snapshot] = {}
    for sid in (snapshot_id,) if against is None else (snapshot_id, against):
        snap = repo.get_snapshot(ch.pk, sid)
        if snap is None:
            raise SnapshotNotFound(f"channel {channel_id!r} has no snapshot {sid}")
        snaps[sid] = snap
    snap = snaps[snapshot_id]
    current = unit.read_model(st)
    old = restore(snap.config, snap.model_state, f"snapshot {snap.pk}")
    from_current = difference(current, old)
    summary = old.summary()
    out = _item(snap)
    out.update({
        "weights": old.weights.tolist(), "basis": old.config["basis"], "rmse": summary["rmse"],
        "drift": summary["drift"], "config": old.config,
        "max_difference_from_current": from_current["max"],
        "curve_difference": {"against": against, **(
            from_current if against is None else difference(current, old, restore(
                snaps[against].config, snaps[against].model_state, f"snapshot {against}")))},
    })
    out.update(old.raw_coefficients())
    return out


def roll_back(current: ChannelModel, restored: ChannelModel, *, set_reference: bool) -> ChannelModel:
    """``restored``'s curve and learner state under ``current``'s lifecycle (reference
    curve, drift watch and alarm, service state, counts), and under the settings the
    snapshot was taken under; with ``set_reference`` the restored curve becomes the
    reference. The replay of a rollback event calls this too."""
    settings = adopt_settings(current.config, restored.config)
    if settings != current.config:  # the watch fits the snapshot's detector, as a PATCH would leave it
        current = current.with_settings(settings)
    return current.take_curve(restored, set_reference=set_reference)


def rollback(unit: Unit, channel_id: str, snapshot_id: int, key_id: str | None, *,
             set_reference: bool = False, reason: str | None = None) -> dict[str, Any]:
    """Restore a snapshot's curve and learner state; the current state is snapshotted
    first. The reference curve, the drift watch (and any alarm) and the service state stay,
    unless ``set_reference`` makes the restored curve the reference. ``reason`` (why, in
    a person's words) goes into the event for the audit trail; replay does not read it."""
    repo = unit.repo
    ch, st = load(repo, channel_id, lock=True)
    snap = repo.get_snapshot(ch.pk, snapshot_id)
    if snap is None:
        raise SnapshotNotFound(f"channel {channel_id!r} has no snapshot {snapshot_id}")
    before = repo.insert_snapshot(ch.pk, reason="before-rollback", label=f"before rollback to {snapshot_id}",
                                  config=ch.config, model_state=repo.model_state(ch.pk), version=st.version,
                                  n_samples=st.n_samples)
    restored = restore(snap.config, snap.model_state, f"snapshot {snap.pk}")
    model = roll_back(unit.read_model(st), restored, set_reference=set_reference)
    version = st.version + 1
    interval = ch.config.get("expected_interval")
    if model.config != ch.config:  # the settings it was taken under come back with it
        repo.save_config(ch, model.config)
    unit.save_model(st, model, version)
    refresh_due(repo, st, model.config, st.last_calibrated_at)  # the interval may have come back too
    repo.insert_events([{"channel_pk": ch.pk, "kind": "rollback", "version": version, "key_id": key_id,
                         "details": {"snapshot": snapshot_id, "snapshot_before": before.pk,
                                     "set_reference": set_reference, **({"reason": reason} if reason else {})}}])
    if set_reference:  # a new reference curve: the trace starts afresh, as after a calibration
        repo.clear_trace(ch.pk)
    else:  # the restored curve's history is the trace up to its snapshot, not the curves after it
        repo.clear_trace(ch.pk, after_version=snap.version)
    if model.config.get("expected_interval") != interval:
        stale.rewatch(repo, st, model.config, unit.now(), reason="rollback", key_id=key_id)
    out = view(ch, st, model, of_channel(repo, ch.pk, model.config), unit.now())
    out["snapshot_before"] = before.pk
    out["restored_snapshot"] = snapshot_id
    out["reference_curve"] = "restored_snapshot" if set_reference else "kept"
    return out
