"""Channel counts by state on ``/metrics`` (``curvekeeper_channels{state=...}``,
``service/curvekeeper/metrics.py`` and ``actions/counts.py``): one series per state of a
fixed set, no channel id in any label; live channels under each state that applies,
archived ones under ``archived`` only; read at scrape and kept ``metrics_cache_s``."""

from __future__ import annotations

import re
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from typing import Any

import pytest
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.metrics import CHANNEL_STATES, OUTBOX_STATES, StoreGauges, StoreReading, method_label, status_label
from curvekeeper.store.tables import Channel, ChannelState
from fastapi.testclient import TestClient
from sqlalchemy import select, update

from tests.api.helpers import Clock, Keys, ok

SERIES = re.compile(r'^curvekeeper_channels\{state="([^"]*)"\} (\S+)$', re.M)
T0 = datetime(2026, 11, 2, 8, 0, tzinfo=UTC)


@pytest.fixture
def clock() -> Clock:
    return Clock(T0)


@pytest.fixture
def client(settings: Settings, clock: Clock) -> Iterator[TestClient]:
    app = create_app(settings.with_(stale_sweep_s=0.0, metrics_cache_s=0.0), clock=clock)
    with TestClient(app) as c:
        yield c


def counts(client: TestClient, keys: Keys) -> dict[str, float]:
    r = client.get("/metrics", headers=keys["technician"])
    assert r.status_code == 200, r.text
    return {state: float(v) for state, v in SERIES.findall(r.text)}


def _set(client: TestClient, channel_id: str, **values: Any) -> None:
    """Put a channel's summary columns in a state directly (the counts read only them)."""
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=True) as repo:
        pk = repo.session.scalars(select(Channel.pk).where(Channel.id == channel_id)).one()
        repo.session.execute(update(ChannelState).where(ChannelState.channel_pk == pk).values(**values))


def test_channels_are_counted_by_state_with_no_channel_label(client: TestClient, keys: Keys, make_channel: Any,
                                                             clock: Clock) -> None:
    assert counts(client, keys) == dict.fromkeys(CHANNEL_STATES, 0.0)
    for i in range(6):
        make_channel(f"site-a.m{i}", expected_interval=60 if i == 1 else None)
    tech = keys["technician"]
    ok(client.post("/v1/channels/site-a.m2/service", json={"state": "out_of_service", "note": "probe out"},
                   headers=tech))
    _set(client, "site-a.m3", drift_state="alarm", tolerance_state="out_of_tolerance")
    _set(client, "site-a.m4", drift_state="warning", due_on=date(2026, 11, 1))
    ok(client.post("/v1/channels/site-a.m5/archive", json={"note": "retired"}, headers=tech))
    clock.now = T0 + timedelta(seconds=180)  # m1: 3 x 60 s without a sample
    # m0, m1, m2 ok; m3 alarm and out of tolerance; m4 warning and overdue (due 2026-11-01 < 2026-11-02)
    assert counts(client, keys) == {"ok": 3, "warning": 1, "alarm": 1, "out_of_tolerance": 1, "out_of_service": 1,
                                    "stale": 1, "archived": 1, "damaged": 0, "overdue": 1}
    # a state that cannot be restored is known once read; a rollback-free count keeps it
    _set(client, "site-a.m0", model_state={"format": 999}, version=ChannelState.version + 1)
    assert client.get("/v1/channels/site-a.m0", headers=tech).status_code == 500
    assert counts(client, keys)["damaged"] == 1
    # a new state replaces it (here: written straight in, as another process's rollback would)
    _set(client, "site-a.m0", version=ChannelState.version + 1)
    assert counts(client, keys)["damaged"] == 0
    text = client.get("/metrics", headers=tech).text
    assert "site-a." not in text  # no channel id in any series


def test_the_counts_are_read_once_per_ttl_and_a_failing_read_skips_the_family() -> None:
    reads: list[int] = []
    now = [0.0]
    fail = [False]

    def read() -> StoreReading:
        if fail[0]:
            raise RuntimeError("store unreachable")
        reads.append(1)
        return StoreReading({"ok": len(reads)}, {"pending": 3})

    gauges = StoreGauges(read, ttl=5.0, clock=lambda: now[0])
    assert gauges.counts() == StoreReading({"ok": 1}, {"pending": 3})
    now[0] = 4.999
    assert gauges.counts() == StoreReading({"ok": 1}, {"pending": 3}) and len(reads) == 1
    now[0] = 5.0
    assert gauges.counts() == StoreReading({"ok": 2}, {"pending": 3})
    fail[0] = True
    now[0] = 20.0
    assert gauges.counts() is None and list(gauges.collect()) == []
    fail[0] = False
    channels, outbox = list(gauges.collect())
    assert [s.labels["state"] for s in channels.samples] == list(CHANNEL_STATES)
    assert [(s.labels["state"], s.value) for s in outbox.samples] == list(zip(OUTBOX_STATES, (3, 0), strict=True))


def test_every_label_value_is_from_a_fixed_set() -> None:
    assert method_label("PURGE") == method_label("BREW") == "other"
    assert method_label("GET") == "GET"
    # registered statuses as themselves (RFC 9110 and the IANA registry, via http.HTTPStatus), others by class
    assert status_label(418) == "418" and status_label(599) == "5xx" and status_label(299) == "2xx"
    assert status_label(42) == "1xx" and status_label(1234) == "5xx"
