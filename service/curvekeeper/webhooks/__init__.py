"""Webhooks: the deliverable event kinds, body signing, the address policy and the
dispatcher that empties the delivery outbox."""

from __future__ import annotations

#: the event kinds a webhook may ask for: today's event names (drift changes; the curve
#: going out of tolerance and back, ``ok``; guards; lifecycle (acknowledged, service
#: changed); calibration and rollback; the silence watch; the due watch; archiving). The one list.
KINDS = ("drift_ok", "drift_warning", "drift_alarm", "out_of_tolerance", "ok", "guard", "acknowledged",
         "service_changed", "calibration", "rollback", "stale", "stale_cleared", "calibration_due_soon",
         "calibration_overdue", "archived", "unarchived")

#: the kind of the event a test send carries (no stored event)
TEST_KIND = "webhook_test"
