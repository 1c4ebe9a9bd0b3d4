"""The curve trace and the forecast made from it: how far the channel's curve has moved
from its reference curve over measurement time, and when it is expected to leave tolerance."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any

import numpy as np

from ..core import ChannelModel
from ..core.forecast import forecast
from ..store import Repository

#: at most one trace point per hour of measurement time (closer points add little but
#: autocorrelation), and per 1/TRACE_SPACING of the trace's age: the trace stays small (about
#: 550 points after a year; its age grows the spacing once the trace is TRACE_SPACING hours old)
TRACE_EVERY_S = 3600.0
TRACE_SPACING = 100

Point = tuple[datetime, float, float | None]


def record(repo: Repository, channel_pk: int, model: ChannelModel, t: datetime, version: int) -> None:
    """After a batch is learnt: a trace point at the batch's latest measurement time ``t``
    when the channel has a reference curve and the last point is older by ``TRACE_EVERY_S``
    and by the trace's age over ``TRACE_SPACING`` (samples older than the last point add
    none). The span is asked first: most batches add no point, and the curve difference (a
    grid evaluation and a prediction, about 0.5 ms) is computed only for one that does."""
    if not model.calibrated:  # no curve at all, so no reference curve either
        return
    span = repo.trace_span(channel_pk)
    if span is not None:
        first, last = span
        if (t - last).total_seconds() < max(TRACE_EVERY_S, (t - first).total_seconds() / TRACE_SPACING):
            return
    found = model.reference_difference()
    if found is None:
        return
    difference, u = found
    repo.insert_trace_point(channel_pk, t=t, difference=difference, u=u, version=version)


def of_points(points: Sequence[Point], config: dict[str, Any]) -> dict[str, Any] | None:
    """The forecast from trace points (oldest first) against the channel's tolerance, as the
    channel's answer gives it (``core.forecast.forecast``), or None."""
    if not points:
        return None
    t = np.array([p[0].timestamp() for p in points])
    d = np.array([p[1] for p in points])
    us = [p[2] for p in points]
    u = None if any(v is None for v in us) else np.array(us, dtype=float)
    return forecast(t, d, u, config["drift"]["tolerance"])


def of_channel(repo: Repository, channel_pk: int, config: dict[str, Any]) -> dict[str, Any] | None:
    return of_points(repo.traces([channel_pk])[channel_pk], config)
