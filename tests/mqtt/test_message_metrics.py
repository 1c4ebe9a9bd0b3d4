"""MQTT messages counted by outcome (``curvekeeper_mqtt_messages_total``): learned, refused
(an error result), deferred (not acknowledged: the store was busy); every outcome series
exists from the start, and no label carries a channel id."""

from __future__ import annotations

import re
from typing import Any

import pytest
from curvekeeper.errors import StoreBusy
from curvekeeper.metrics import MQTT_OUTCOMES, mqtt_outcome
from curvekeeper.mqtt import ingest_message
from fastapi.testclient import TestClient

from tests.api.helpers import Keys

SERIES = re.compile(r'^curvekeeper_mqtt_messages_total\{outcome="([^"]*)"\} (\S+)$', re.M)


def outcomes(client: TestClient, keys: Keys) -> dict[str, float]:
    r = client.get("/metrics", headers=keys["technician"])
    assert r.status_code == 200, r.text
    return {o: float(v) for o, v in SERIES.findall(r.text)}


def test_messages_are_counted_by_outcome(client: TestClient, keys: Keys, make_channel: Any,
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    make_channel("site-a.p1")
    assert outcomes(client, keys) == dict.fromkeys(MQTT_OUTCOMES, 0.0)
    for payload in (b'{"samples": [{"x": 1, "y": 3}]}', b'{"samples": [{"x": 2, "y": 5}]}', b"{not json"):
        ingest_message(ctx.work, ctx.settings, ctx.metrics, "site-a.p1", payload)
    ingest_message(ctx.work, ctx.settings, ctx.metrics, "site-a.none", b'{"samples": [{"x": 1, "y": 3}]}')

    def busy(*_: Any, **__: Any) -> Any:
        raise StoreBusy("the store is busy or unavailable; retry shortly", details={"reason": "locked"})

    monkeypatch.setattr(ctx.work, "unit", busy)
    ingest_message(ctx.work, ctx.settings, ctx.metrics, "site-a.p1", b'{"samples": [{"x": 3, "y": 7}]}')
    monkeypatch.undo()
    assert outcomes(client, keys) == {"accepted": 2.0, "refused": 2.0, "failed": 0.0, "deferred": 1.0}


def test_an_outcome_is_read_off_the_status_and_the_acknowledgement() -> None:
    assert [mqtt_outcome(s, True) for s in (200, 400, 404, 422, 500, 503)] == \
        ["accepted", "refused", "refused", "refused", "failed", "failed"]
    assert mqtt_outcome(503, False) == "deferred"
