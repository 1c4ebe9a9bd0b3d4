"""The due watch: the events that tell a channel's calibration is due soon or overdue.

A channel's due date (``due_on``, from its latest calibration and its
``recalibration_interval_days``) is kept on its state row, so answers and the list's
``?due_state=`` are exact on any day without this module. What it adds is the event, once:
``calibration_due_soon`` from ``due_soon_on`` (``due_soon_days`` ahead), and
``calibration_overdue`` the day after ``due_on`` (UTC days). The periodic sweep writes them
with a conditional UPDATE of ``due_noticed`` (several processes on one store write one event
each); a new due date (a calibration, a change of interval, a rollback) clears the mark, so
the next due date is told again. Archived channels are not watched.
"""

from __future__ import annotations

from datetime import datetime

from ..store import Repository
from .unit import Work

#: the events, by the mark they set
KIND = {"due_soon": "calibration_due_soon", "overdue": "calibration_overdue"}
#: channels one sweep transaction marks at most (the next transaction takes the rest)
SWEEP_BATCH = 500


def sweep(repo: Repository, now: datetime, limit: int = SWEEP_BATCH) -> int:
    """Mark up to ``limit`` channels due soon or overdue on ``now``'s UTC day and write their
    events; how many. Running it again on the same day marks none."""
    rows = repo.mark_due(now.date(), limit)
    repo.insert_events([{"channel_pk": pk, "kind": KIND[mark], "version": version, "key_id": None, "at": now,
                         "details": {"due_on": due_on.isoformat(), "on": now.date().isoformat()}}
                        for pk, mark, due_on, version in rows])
    return len(rows)


def sweep_all(work: Work) -> int:
    """Sweep until nothing is left, one transaction per ``SWEEP_BATCH`` channels."""
    return work.in_batches(sweep, SWEEP_BATCH)
