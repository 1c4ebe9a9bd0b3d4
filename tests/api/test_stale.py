"""Silent channels (``service/curvekeeper/actions/stale.py``): ``expected_interval`` on the
channel, ``stale`` / ``stale_since`` in its answer, ``quality.stale`` in predict,
``?state=stale`` in the list, the ``stale`` / ``stale_cleared`` events and the sweep.

The app runs on a clock the tests move (``create_app(clock=...)``); the service's own sweep
is off (``stale_sweep_s`` 0) and the tests call it, so nothing depends on real time.
Bad input first; every refused request leaves the store as it was (``expect_error``)."""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from curvekeeper.actions import stale
from curvekeeper.actions.unit import Work
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error, ok

CH = "site-a.quiet"
BASE = f"/v1/channels/{CH}"
T0 = datetime(2026, 11, 2, 8, 0, tzinfo=UTC)


class Clock:
    """Aware UTC time that moves only when told."""

    def __init__(self, now: datetime) -> None:
        self.now = now

    def __call__(self) -> datetime:
        return self.now

    def at(self, seconds: float) -> None:
        self.now = T0 + timedelta(seconds=seconds)


@pytest.fixture
def clock() -> Clock:
    return Clock(T0)


@pytest.fixture
def client(settings: Settings, clock: Clock) -> Iterator[TestClient]:
    with TestClient(create_app(settings.with_(stale_sweep_s=0.0), clock=clock)) as c:
        yield c


def work(client: TestClient) -> Work:
    return client.app.state.ctx.work  # type: ignore[attr-defined,no-any-return]


def sweep(client: TestClient) -> int:
    return stale.sweep_all(work(client))


def sample(client: TestClient, keys: Keys, seq: int) -> dict[str, Any]:
    body = {"source": "probe", "samples": [{"x": 10.0 * seq, "y": 1.0 + 0.2 * seq, "seq": seq}]}
    return ok(client.post(f"{BASE}/samples", json=body, headers=keys["device"]))  # type: ignore[no-any-return]


def channel(client: TestClient, keys: Keys) -> dict[str, Any]:
    return ok(client.get(BASE, headers=keys["technician"]))  # type: ignore[no-any-return]


def events(client: TestClient, keys: Keys, kind: str) -> list[dict[str, Any]]:
    page = ok(client.get(f"{BASE}/events", params={"kind": kind}, headers=keys["technician"]))
    return page["items"]  # type: ignore[no-any-return]


def listed(client: TestClient, keys: Keys) -> list[str]:
    page = ok(client.get("/v1/channels", params={"state": "stale"}, headers=keys["technician"]))
    return [c["id"] for c in page["items"]]


def quality_stale(client: TestClient, keys: Keys) -> bool:
    out = ok(client.post(f"{BASE}/predict", json={"x": [50.0]}, headers=keys["device"]))
    return out["quality"]["stale"]  # type: ignore[no-any-return]


# bad input -----------------------------------------------------------------------------

@pytest.mark.parametrize("value", [0, -60, "60", True, 10 * 366 * 86400 + 1, [60]])
def test_a_bad_expected_interval_is_refused_on_create_and_patch(client: TestClient, keys: Keys, make_channel: Any,
                                                                value: Any) -> None:
    make_channel(CH)
    body = {"id": "site-a.other", "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
            "output": {"name": "p", "unit": "kPa"}, "expected_interval": value}
    err = expect_error(client, "POST", "/v1/channels", 422, {"validation_error", "invalid_config"},
                       headers=keys["technician"], json=body)
    assert "expected_interval" in str(err)
    err = expect_error(client, "PATCH", BASE, 422, {"validation_error", "invalid_config"},
                       headers=keys["technician"], json={"expected_interval": value})
    assert "expected_interval" in str(err)


def test_the_stale_filter_is_named_and_a_bad_state_refused(client: TestClient, keys: Keys) -> None:
    expect_error(client, "GET", "/v1/channels", 422, {"invalid_request", "validation_error"},
                 headers=keys["technician"], params={"state": "silent"})


# the watch -------------------------------------------------------------------------------

def test_stale_after_three_intervals_without_a_sample_and_cleared_by_the_next(client: TestClient, keys: Keys,
                                                                              make_channel: Any,
                                                                              clock: Clock) -> None:
    made = make_channel(CH, expected_interval=60)
    assert made["expected_interval"] == 60 and made["stale"] is False and made["stale_since"] is None
    for seq in range(1, 4):
        sample(client, keys, seq)  # received at T0: the watch counts from here
    clock.at(179.999)  # 3 x 60 s = 180 s, worked by hand
    assert channel(client, keys)["stale"] is False
    assert listed(client, keys) == [] and quality_stale(client, keys) is False
    assert sweep(client) == 0 and events(client, keys, "stale") == []
    clock.at(180)
    ch = channel(client, keys)
    assert ch["stale"] is True and ch["stale_since"] == "2026-11-02T08:03:00Z"
    assert listed(client, keys) == [CH] and quality_stale(client, keys) is True
    # the sweep writes the event once, however often it runs
    clock.at(200)
    assert sweep(client) == 1
    assert sweep(client) == 0
    clock.at(900)
    assert sweep(client) == 0
    marked = events(client, keys, "stale")
    assert len(marked) == 1 and marked[0]["details"]["stale_since"] == "2026-11-02T08:03:00+00:00"
    assert marked[0]["details"]["noticed_by"] == "sweep"
    # the next sample clears it, and the watch counts from that sample's receipt
    sample(client, keys, 4)
    ch = channel(client, keys)
    assert ch["stale"] is False and ch["stale_since"] is None
    cleared = events(client, keys, "stale_cleared")
    assert len(cleared) == 1 and cleared[0]["details"]["reason"] == "sample"
    assert cleared[0]["details"]["sample_seq"] == 4
    assert listed(client, keys) == [] and quality_stale(client, keys) is False
    clock.at(900 + 179)
    assert sweep(client) == 0 and channel(client, keys)["stale"] is False
    clock.at(900 + 180)
    assert sweep(client) == 1 and len(events(client, keys, "stale")) == 2


def test_a_silence_the_sweep_missed_is_written_by_the_sample_that_ends_it(client: TestClient, keys: Keys,
                                                                          make_channel: Any, clock: Clock) -> None:
    make_channel(CH, expected_interval=10)
    clock.at(31)  # never a sample: the watch counts from the channel's creation
    assert channel(client, keys)["stale"] is True
    sample(client, keys, 1)
    [marked] = events(client, keys, "stale")
    [cleared] = events(client, keys, "stale_cleared")
    assert marked["details"] == {"stale_since": "2026-11-02T08:00:30+00:00", "noticed_by": "sample"}
    assert marked["id"] < cleared["id"]
    assert sweep(client) == 0 and channel(client, keys)["stale"] is False


def test_a_channel_without_expected_interval_is_never_stale(client: TestClient, keys: Keys, make_channel: Any,
                                                            clock: Clock) -> None:
    made = make_channel(CH)
    assert made["expected_interval"] is None
    sample(client, keys, 1)
    clock.at(10 * 366 * 86400)
    assert sweep(client) == 0
    assert channel(client, keys)["stale"] is False and listed(client, keys) == []
    assert quality_stale(client, keys) is False and events(client, keys, "stale") == []


def test_changing_expected_interval_counts_from_the_last_receipt(client: TestClient, keys: Keys,
                                                                 make_channel: Any, clock: Clock) -> None:
    make_channel(CH)
    sample(client, keys, 1)
    clock.at(600)  # silent for 10 min, not watched
    tech = keys["technician"]
    ch = ok(client.patch(BASE, json={"expected_interval": 60}, headers=tech))
    assert ch["stale"] is True and ch["stale_since"] == "2026-11-02T08:03:00Z"  # T0 + 3 x 60 s
    assert sweep(client) == 1
    # a longer interval that no longer makes it stale clears it, naming the change
    ch = ok(client.patch(BASE, json={"expected_interval": 3600}, headers=tech))
    assert ch["stale"] is False
    [cleared] = events(client, keys, "stale_cleared")
    assert cleared["details"]["reason"] == "settings_changed"
    # back to 60 s: stale again (a new silence, a new event); null: not watched, cleared
    ok(client.patch(BASE, json={"expected_interval": 60}, headers=tech))
    assert sweep(client) == 1
    ch = ok(client.patch(BASE, json={"expected_interval": None}, headers=tech))
    assert ch["stale"] is False and ch["expected_interval"] is None
    assert len(events(client, keys, "stale")) == 2 and len(events(client, keys, "stale_cleared")) == 2
    clock.at(10**6)
    assert sweep(client) == 0


def test_an_archived_channel_is_not_watched_and_unarchiving_restarts_the_watch(client: TestClient, keys: Keys,
                                                                               make_channel: Any,
                                                                               clock: Clock) -> None:
    make_channel(CH, expected_interval=60)
    tech = keys["technician"]
    clock.at(200)
    assert sweep(client) == 1
    ok(client.post(f"{BASE}/archive", json={"note": "probe removed"}, headers=tech))
    assert [c["reason"] for c in (e["details"] for e in events(client, keys, "stale_cleared"))] == ["archived"]
    clock.at(10_000)
    assert sweep(client) == 0
    page = ok(client.get("/v1/channels", params={"state": "stale", "archived": "include"}, headers=tech))
    assert page["items"] == []
    ch = ok(client.post(f"{BASE}/unarchive", json={"note": "refitted"}, headers=tech))
    assert ch["stale"] is False
    clock.at(10_179)
    assert sweep(client) == 0
    clock.at(10_180)
    assert sweep(client) == 1


def test_a_rollback_that_brings_back_the_interval_brings_back_the_watch(client: TestClient, keys: Keys,
                                                                       make_channel: Any, clock: Clock) -> None:
    make_channel(CH, expected_interval=60)
    tech = keys["technician"]
    snap = ok(client.post(f"{BASE}/snapshots", json={"label": "watched"}, headers=tech), 201)
    ok(client.patch(BASE, json={"expected_interval": None}, headers=tech))
    clock.at(500)
    assert channel(client, keys)["stale"] is False and sweep(client) == 0
    ch = ok(client.post(f"{BASE}/rollback", json={"snapshot": snap["id"]}, headers=tech))
    assert ch["expected_interval"] == 60 and ch["stale"] is True  # silent since its creation: T0 + 180 s
    assert ch["stale_since"] == "2026-11-02T08:03:00Z"
    assert sweep(client) == 1


def test_the_service_sweeps_every_interval(client: TestClient, keys: Keys, make_channel: Any, clock: Clock) -> None:
    """The lifespan's loop, with its sleep replaced: it sleeps, then sweeps, again and again."""
    make_channel(CH, expected_interval=1)
    clock.at(3)
    slept: list[float] = []

    async def sleep(seconds: float) -> None:
        slept.append(seconds)
        if len(slept) == 3:
            raise asyncio.CancelledError

    with pytest.raises(asyncio.CancelledError):
        asyncio.run(stale.sweep_forever(work(client), 7.5, sleep))
    assert slept == [7.5, 7.5, 7.5]
    assert len(events(client, keys, "stale")) == 1  # two sweeps ran; the event was written once


def test_two_sweeps_at_once_write_one_event(client: TestClient, keys: Keys, make_channel: Any, clock: Clock) -> None:
    """Another sweep (as another process's) starts while this one has marked the channel and
    not yet committed: it waits for the row, then finds it marked. Whichever order the two
    end up in, one of them marks it and the other finds nothing."""
    make_channel(CH, expected_interval=60)
    clock.at(180)
    w = work(client)
    other: list[int] = []
    with w.unit(write=True) as unit:
        first = stale.sweep(unit.repo, unit.now())
        t = threading.Thread(target=lambda: other.append(stale.sweep_all(w)))
        t.start()
        t.join(0.2)  # give it the time to reach the row (not needed for the result)
    t.join()
    assert (first, other) == (1, [0])
    assert len(events(client, keys, "stale")) == 1
