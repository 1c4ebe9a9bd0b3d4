"""How channels and times are shown to a person: the one rule the pages and the command
line both follow. The pages hold the same two functions in ``web/static/common.js``
(``CK.when``, ``CK.rank``); ``tests/web/test_display.py`` runs both on the same cases.

Times: UTC, ``YYYY-MM-DD HH:MM:SS`` (whole seconds, the fraction cut off, not rounded;
no zone letter: the headings say UTC). A value that is no time is shown as it came.

Channel order: attention first; within a rank the soonest forecast to leave tolerance
first (``forecast_key``), then by id (plain character order, as the ids are lower-case
letters, digits, ``.``, ``_`` and ``-``). Ranks: 0 a stored state that cannot be
restored, 1 drift alarm, 2 out of service, 3 out of tolerance, 4 stale (no sample for 3
expected intervals: nothing checks the curve), 5 drift warning, 6 a calibration overdue,
7 the rest, 8 archived (listed only when asked, after the live ones). Ranks below 7 need
attention.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from typing import Any

#: ranks below this need attention
ATTENTION = 7
ARCHIVED = 8


def when(value: str | datetime | None, missing: str = "-") -> str:
    """An ISO-8601 time (text or aware datetime) as ``YYYY-MM-DD HH:MM:SS`` in UTC; ``missing``
    for None or empty; text that is no time, unchanged."""
    if value is None or value == "":
        return missing
    if isinstance(value, str):
        try:
            t = datetime.fromisoformat(value)
        except ValueError:
            return value
    else:
        t = value
    if t.tzinfo is None:  # the service always sends a zone; a bare time is taken as UTC, as a browser does
        t = t.replace(tzinfo=UTC)
    return t.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S")


def rank(channel: Mapping[str, Any]) -> int:
    """Where a channel (as ``GET /v1/channels`` lists it) comes in the list: 0 first."""
    drift = channel.get("drift") or {}
    if channel.get("archived"):
        return ARCHIVED
    if channel.get("state") == "damaged":
        return 0
    if drift.get("state") == "alarm":
        return 1
    if channel.get("service_state") == "out_of_service":
        return 2
    if drift.get("tolerance_state") == "out_of_tolerance":
        return 3
    if channel.get("stale"):
        return 4
    if drift.get("state") == "warning":
        return 5
    if channel.get("due_state") == "overdue":
        return 6
    return ATTENTION


def forecast_key(forecast: Mapping[str, Any] | None) -> float:
    """When a channel is expected to leave tolerance, as a POSIX time for sorting (its
    ``leaves_tolerance_on``, else the interval's ``low``); infinity when not foreseen."""
    if not forecast or forecast.get("not_within_days") is not None:
        return math.inf
    day = forecast.get("leaves_tolerance_on") or forecast.get("low")
    if not day:
        return math.inf
    t = datetime.fromisoformat(str(day))
    return (t if t.tzinfo else t.replace(tzinfo=UTC)).timestamp()


def fleet_order(channels: Iterable[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """The channels as the fleet page lists them: by rank, the soonest forecast, then by id."""
    return sorted(channels, key=lambda c: (rank(c), forecast_key(c.get("forecast")), str(c["id"])))
