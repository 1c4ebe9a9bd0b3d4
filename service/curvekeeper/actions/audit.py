"""The audit trail: every event of every channel, and the key events that belong to none,
each with the key that caused it and a one-line summary."""

from __future__ import annotations

from typing import Any

from ..store import Repository
from ..store.tables import Event
from .paging import Page, decode_cursor, encode_cursor

#: detail fields never shown, whatever event might carry them
HIDDEN = frozenset({"secret", "secret_hash", "authorization"})


def _scrub(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _scrub(v) for k, v in value.items() if str(k).lower() not in HIDDEN}
    if isinstance(value, list):
        return [_scrub(v) for v in value]
    return value


def _why(d: dict[str, Any]) -> str:
    """The reason a person gave, when they gave one."""
    return f": {d['reason']}" if d.get("reason") else ""


def summary(e: Event, channel: str | None) -> str:
    """What happened, in a few words, for a person reading the trail."""
    d = e.details or {}
    on = f" on {channel}" if channel else ""
    match e.kind:
        case "channel_created":
            return f"created channel {channel}"
        case "settings_changed":
            changed = ", ".join(sorted(d.get("changes") or {})) or "nothing"
            return f"changed settings{on}: {changed}"
        case "calibration":
            label = f" ({d['label']})" if d.get("label") else ""
            return f"calibrated{on} on {d.get('n')} points{label}{_why(d)}"
        case "snapshot":
            return f"took snapshot {d.get('snapshot')}{on} ({d.get('reason')})"
        case "rollback":
            reference = ", its curve now the reference" if d.get("set_reference") else ""
            return f"rolled{on} back to snapshot {d.get('snapshot')}{reference}{_why(d)}"
        case "acknowledged":
            return f"acknowledged drift {d.get('drift_state')}{on}: {d.get('note')}"
        case "service_changed":
            return f"put{on} {str(d.get('to')).replace('_', ' ')}: {d.get('note')}"
        case "key_created":
            prefixes = f" limited to {', '.join(d['prefixes'])}" if d.get("prefixes") else ""
            return f"created {d.get('role')} key {d.get('id')}{prefixes}"
        case "key_revoked":
            return f"revoked key {d.get('id')}"
        case "reference_created":
            return f"created reference instrument {d.get('reference')}"
        case "reference_changed":
            changed = ", ".join(sorted(d.get("changes") or {})) or "nothing"
            return f"changed reference instrument {d.get('reference')}: {changed}"
        case "reference_retired":
            return f"retired reference instrument {d.get('reference')}"
        case "guard":
            return f"guard{on} at sample {d.get('sample_seq')}: {d.get('message')}"
        case kind if kind.startswith("drift_"):
            return f"drift {kind.removeprefix('drift_')}{on} at sample {d.get('sample_seq')} (was {d.get('from')})"
        case _:
            return f"{e.kind.replace('_', ' ')}{on}"


def list_(repo: Repository, *, kind: str | None, key_id: str | None, cursor: str | None, limit: int) -> Page:
    rows = repo.list_all_events(kind=kind, key_id=key_id, after_pk=decode_cursor(cursor), limit=limit + 1)
    items = [{"id": e.pk, "kind": e.kind, "channel": channel, "key_id": e.key_id, "at": e.at,
              "version": e.version, "summary": summary(e, channel), "details": _scrub(e.details)}
             for e, channel in rows[:limit]]
    return Page(items, encode_cursor(rows[limit - 1][0].pk) if len(rows) > limit else None)
