"""The display rule (``service/curvekeeper/display.py``) on its own; the pages' twin of it is
checked against it in ``tests/web/test_archive_pages.py``."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

from curvekeeper import display


def test_times_are_utc_whole_seconds() -> None:
    # worked by hand: the fraction is cut off (not rounded), an offset is taken away
    assert display.when("2026-11-10T01:30:59.999999Z") == "2026-11-10 01:30:59"
    assert display.when("2026-06-01T02:00:00+02:00") == "2026-06-01 00:00:00"
    assert display.when("2026-01-01T00:10:00+05:30") == "2025-12-31 18:40:00"
    assert display.when(datetime(2026, 3, 1, 12, 0, 7, 500000, tzinfo=timezone(timedelta(hours=-3)))) == \
        "2026-03-01 15:00:07"
    assert display.when(datetime(2026, 3, 1, 12, 0, 7, tzinfo=UTC)) == "2026-03-01 12:00:07"
    assert display.when("2026-11-10T01:30:00") == "2026-11-10 01:30:00"  # no zone: UTC
    assert display.when(None) == "-" and display.when("") == "-" and display.when(None, "never") == "never"
    assert display.when("yesterday") == "yesterday"


def test_channels_come_attention_first_then_by_id_archived_last() -> None:
    chans = [
        {"id": "z.ok", "drift": {"state": "ok"}, "service_state": "in_service"},
        {"id": "a_2", "drift": {"state": "ok"}, "service_state": "in_service"},
        {"id": "a-1", "drift": {"state": "ok"}, "service_state": "in_service"},
        {"id": "gone", "drift": {"state": "alarm"}, "archived": True},
        {"id": "w", "drift": {"state": "warning", "tolerance_state": "ok"}},
        {"id": "t", "drift": {"state": "ok", "tolerance_state": "out_of_tolerance"}},
        {"id": "s", "drift": {"state": "ok"}, "service_state": "out_of_service"},
        {"id": "al", "drift": {"state": "alarm"}, "service_state": "out_of_service"},
        {"id": "dm", "state": "damaged"},
        {"id": "od", "drift": {"state": "ok"}, "due_state": "overdue"},
        # silent for 3 expected intervals: above a drift warning (nothing checks its curve), below out of tolerance
        {"id": "q", "drift": {"state": "warning"}, "stale": True, "due_state": "overdue"},
        # the soonest forecast to leave tolerance first within a rank; none foreseen last
        {"id": "f2", "drift": {"state": "ok"}, "forecast": {"leaves_tolerance_on": "2027-05-01", "low": "2027-03-01",
                                                            "not_within_days": None}},
        {"id": "f1", "drift": {"state": "ok"}, "forecast": {"leaves_tolerance_on": "2027-04-30", "low": "2027-04-01",
                                                            "not_within_days": None}},
        {"id": "f0", "drift": {"state": "ok"}, "forecast": {"leaves_tolerance_on": None, "low": None,
                                                            "not_within_days": 365}},
    ]
    assert [c["id"] for c in display.fleet_order(chans)] == [
        "dm", "al", "s", "t", "q", "w", "od", "f1", "f2", "a-1", "a_2", "f0", "z.ok", "gone"]
    assert [display.rank(c) for c in display.fleet_order(chans)] == [0, 1, 2, 3, 4, 5, 6, 7, 7, 7, 7, 7, 7, 8]
    assert sum(display.rank(c) < display.ATTENTION for c in chans) == 7
