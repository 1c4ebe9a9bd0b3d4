"""What the metrics read from the store: channels by state and the webhook outbox, in one
read transaction."""

from __future__ import annotations

from ..metrics import StoreReading
from .unit import Work


def store_reading(work: Work) -> StoreReading:
    """Channels by state now (``metrics.CHANNEL_STATES``) and webhook deliveries pending and
    dead. ``damaged`` counts the channels whose stored state this process failed to restore
    and that no change has replaced since (a state is known damaged only by restoring it; a
    count does not restore them all)."""
    damaged = dict(work.models.damaged)
    with work.unit(write=False) as unit:
        now = unit.now()
        if damaged:
            current = unit.repo.versions(damaged)
            for pk, version in damaged.items():
                if current.get(pk) != version:  # rolled back (in any process) or deleted
                    work.models.damaged.pop(pk, None)
            damaged = {pk: v for pk, v in damaged.items() if current.get(pk) == v}
        return StoreReading(unit.repo.count_states(now, now.date(), damaged), unit.repo.outbox_depth())
