"""Channel counts by state, for the metrics: one query over the state rows."""

from __future__ import annotations

from .unit import Work


def by_state(work: Work) -> dict[str, int]:
    """Channels by state now (``metrics.CHANNEL_STATES``): ``damaged`` counts the channels
    whose stored state this process failed to restore and that no change has replaced
    since (a state is known damaged only by restoring it; a count does not restore them all)."""
    damaged = dict(work.models.damaged)
    with work.unit(write=False) as unit:
        now = unit.now()
        if damaged:
            current = unit.repo.versions(damaged)
            for pk, version in damaged.items():
                if current.get(pk) != version:  # rolled back (in any process) or deleted
                    work.models.damaged.pop(pk, None)
            damaged = {pk: v for pk, v in damaged.items() if current.get(pk) == v}
        return unit.repo.count_states(now, now.date(), damaged)
