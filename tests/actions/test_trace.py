"""The curve trace's spacing (actions/trace.py): at most one point an hour of measurement
time, and fewer as the trace ages, so a year of batches keeps a few hundred points.
The count is checked against the spacing rule integrated by hand: dN = K dt / age once the
age passes K hours, so N = K + K ln(T / K h) (K = TRACE_SPACING, T the trace's age)."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from typing import Any

from curvekeeper.actions.trace import TRACE_SPACING, record


class FakeRepo:
    """Just what ``record`` asks of the repository, kept in a list."""

    def __init__(self) -> None:
        self.points: list[datetime] = []

    def trace_span(self, channel_pk: int) -> tuple[datetime, datetime] | None:
        return (self.points[0], self.points[-1]) if self.points else None

    def insert_trace_point(self, channel_pk: int, *, t: datetime, difference: float, u: float | None,
                           version: int) -> None:
        self.points.append(t)


class Referenced:
    calibrated = True

    def __init__(self) -> None:
        self.asked = 0

    def reference_difference(self) -> tuple[float, float | None]:
        self.asked += 1
        return 0.01, 0.002


class Uncalibrated:
    calibrated = False

    def reference_difference(self) -> None:
        raise AssertionError("a channel without a curve has no reference curve: not asked")


class LearnedOnly:
    """A curve learnt from samples, without a calibration: no reference curve."""

    calibrated = True

    def reference_difference(self) -> None:
        return None


T0 = datetime(2026, 1, 1, tzinfo=UTC)


def feed(model: Any, hours: int, step_min: int = 60) -> FakeRepo:
    repo = FakeRepo()
    for i in range(hours * 60 // step_min):
        record(repo, 1, model, T0 + timedelta(minutes=i * step_min), i)  # type: ignore[arg-type]
    return repo


def test_a_year_of_batches_keeps_a_few_hundred_points() -> None:
    """Batches every 5 minutes: fine enough that the spacing is not rounded up by much."""
    hours = 365 * 24
    n = len(feed(Referenced(), hours, step_min=5).points)
    expected = TRACE_SPACING + TRACE_SPACING * math.log(hours / TRACE_SPACING)
    assert abs(n - expected) <= 0.05 * expected, (n, expected)


def test_batches_closer_than_an_hour_add_no_point_and_a_channel_without_reference_none() -> None:
    assert len(feed(Referenced(), 10, step_min=20).points) == 10  # 30 batches over 10 hours
    assert feed(Uncalibrated(), 48).points == []
    assert feed(LearnedOnly(), 48).points == []


def test_the_curve_difference_is_computed_only_for_a_batch_that_adds_a_point() -> None:
    """It costs a grid evaluation and a prediction: not for the batches the spacing skips."""
    model = Referenced()
    assert len(feed(model, 10, step_min=20).points) == 10
    assert model.asked == 10
