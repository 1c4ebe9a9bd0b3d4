"""Delivery: the outbox written with the event, the dispatcher's passes (driven one at a
time with an explicit time ``now`` and no jitter: no sleeps, no timing asserts), signatures
checked by a receiver on 127.0.0.1, retries, dead letters, re-sending and a restart.

The service's own dispatcher is off (``webhook_dispatch_s`` 0): the tests run its passes."""

from __future__ import annotations

import asyncio
import re
from collections.abc import Iterable, Iterator
from datetime import datetime, timedelta
from typing import Any

import pytest
from curvekeeper.actions import webhooks as actions
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.store.tables import utcnow
from curvekeeper.webhooks.dispatcher import Dispatcher, Outcome, backoff, pinned
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error, ok
from tests.webhooks.receiver import Receiver

CH = "site-a.hooked"
BASE = f"/v1/channels/{CH}"
HOOKS = "/v1/webhooks"
SECRET = "receiver-secret-0123456789"
LINEAR = {"inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
          "output": {"name": "pressure", "unit": "kPa"}, "basis": {"kind": "poly", "degree": 1}}
POINTS = {"points": [{"x": x, "y": 1.0 + 0.5 * x} for x in (0.0, 25.0, 50.0, 75.0, 100.0)]}


@pytest.fixture
def quiet(settings: Settings) -> Settings:
    return settings.with_(webhook_dispatch_s=0.0, stale_sweep_s=0.0, webhook_max_attempts=4, metrics_cache_s=0.0)


@pytest.fixture
def client(quiet: Settings) -> Iterator[TestClient]:
    with TestClient(create_app(quiet)) as c:
        yield c


@pytest.fixture
def receiver() -> Iterator[Receiver]:
    r = Receiver(SECRET)
    yield r
    if r.server is not None:
        r.stop()


def dispatcher(client: TestClient, **kw: Any) -> Dispatcher:
    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    return Dispatcher(ctx.work, ctx.settings, rng=lambda: 0.0, metrics=ctx.metrics, **kw)


def metric(client: TestClient, keys: Keys, family: str, label: str, value: str) -> float:
    """One series of /metrics, e.g. ``curvekeeper_webhook_outbox{state="dead"}``."""
    text = ok_text(client.get("/metrics", headers=keys["technician"]))
    found = re.search(rf'^{family}\{{{label}="{value}"\}} (\S+)$', text, re.M)
    assert found, f"no {family}{{{label}={value}}} in /metrics"
    return float(found.group(1))


def ok_text(r: Any) -> str:
    assert r.status_code == 200, r.text
    return str(r.text)


def hook(client: TestClient, keys: Keys, url: str, events: list[str]) -> str:
    return ok(client.post(HOOKS, json={"url": url, "events": events, "secret": SECRET}, headers=keys["admin"]),
              201)["id"]  # type: ignore[no-any-return]


def calibrate_and_roll_back(client: TestClient, keys: Keys) -> None:
    """One calibration, a snapshot, and a rollback to it: a calibration and a rollback event."""
    tech = keys["technician"]
    ok(client.post("/v1/channels", json={"id": CH, **LINEAR}, headers=keys["admin"]), 201)
    ok(client.post(f"{BASE}/calibrate", json=POINTS, headers=tech))
    snap = ok(client.post(f"{BASE}/snapshots", json={"label": "bench"}, headers=tech), 201)
    ok(client.post(f"{BASE}/rollback", json={"snapshot": snap["id"]}, headers=tech))


def deliveries(client: TestClient, keys: Keys, hid: str, state: str | None = None) -> list[dict[str, Any]]:
    params = {"state": state} if state else None
    return ok(client.get(f"{HOOKS}/{hid}/deliveries", params=params,  # type: ignore[no-any-return]
                         headers=keys["admin"]))["items"]


def later(seconds: float = 0.0) -> datetime:
    """A time after every event the test made so far (events are stamped with the real clock)."""
    return utcnow() + timedelta(seconds=1 + seconds)


def test_an_event_is_delivered_once_signed(client: TestClient, keys: Keys, receiver: Receiver) -> None:
    hid = hook(client, keys, receiver.url, ["calibration", "rollback"])
    other = hook(client, keys, receiver.url, ["drift_alarm"])  # wants neither
    calibrate_and_roll_back(client, keys)
    assert [d["state"] for d in deliveries(client, keys, hid)] == ["pending", "pending"]
    assert metric(client, keys, "curvekeeper_webhook_outbox", "state", "pending") == 2  # the outbox's depth
    assert deliveries(client, keys, other) == []
    d = dispatcher(client)
    now = later()
    assert d.run_once(now) == 2
    assert d.run_once(now + timedelta(hours=1)) == 0  # once only
    assert [r["signed"] for r in receiver.received] == [True, True]
    assert [e["kind"] for e in receiver.events()] == ["calibration", "rollback"]
    for r in receiver.received:
        assert r["delivery"] == str(r["body"]["delivery_id"])
    # the event as the events route answers it
    events = {e["id"]: e for e in ok(client.get(f"{BASE}/events", headers=keys["technician"]))["items"]}
    for sent in receiver.events():
        mine = events[sent["id"]]
        assert sent["channel"] == CH
        assert {k: sent[k] for k in ("kind", "version", "key_id", "details")} == \
               {k: mine[k] for k in ("kind", "version", "key_id", "details")}
        assert datetime.fromisoformat(sent["at"]) == datetime.fromisoformat(mine["at"].replace("Z", "+00:00"))
    assert {x["state"] for x in deliveries(client, keys, hid)} == {"delivered"}


def test_a_wrong_secret_fails_the_receivers_check(client: TestClient, keys: Keys) -> None:
    r = Receiver("some-other-secret-0123456789")
    try:
        hook(client, keys, r.url, ["calibration", "rollback"])
        calibrate_and_roll_back(client, keys)
        dispatcher(client).run_once(later())
        assert [x["signed"] for x in r.received] == [False, False]
    finally:
        r.stop()


def test_test_send(client: TestClient, keys: Keys, receiver: Receiver) -> None:
    hid = hook(client, keys, receiver.url, ["stale"])
    queued = ok(client.post(f"{HOOKS}/{hid}/test", headers=keys["admin"]), 202)
    assert queued["state"] == "pending" and queued["event_id"] is None
    dispatcher(client).run_once(later())
    assert [e["kind"] for e in receiver.events()] == ["webhook_test"] and receiver.received[0]["signed"]


def test_a_receiver_down_for_a_while_gets_everything_once_back(client: TestClient, keys: Keys,
                                                               receiver: Receiver) -> None:
    hid = hook(client, keys, receiver.url, ["calibration", "rollback"])
    receiver.stop()
    calibrate_and_roll_back(client, keys)
    d = dispatcher(client)
    now = later()
    for _ in range(6):  # attempts 1..3 of each fail (connection refused); each waits 2, 4, 8 s
        assert d.run_once(now) == 1  # after a failure, the hook's other delivery waits for the next pass
        now += timedelta(seconds=60)
    states = deliveries(client, keys, hid)
    assert [(x["state"], x["attempts"], x["last_status"]) for x in states] == [("pending", 3, None)] * 2
    receiver.start()
    assert d.run_once(now) == 2
    assert d.run_once(now + timedelta(days=1)) == 0
    assert sorted(e["kind"] for e in receiver.events()) == ["calibration", "rollback"]
    assert all(r["signed"] for r in receiver.received)


def test_a_receiver_that_is_down_costs_a_pass_one_attempt_and_holds_up_no_other(client: TestClient, keys: Keys,
                                                                                receiver: Receiver) -> None:
    sent: list[str] = []

    def send(url: str, raw: bytes, headers: dict[str, str], timeout_s: float, address: str) -> Outcome:
        sent.append(url)  # as a slow receiver would, the down one answers nothing
        return Outcome(None, "timed out") if url.endswith("/down") else Outcome(204)

    down = hook(client, keys, receiver.url + "/down", ["calibration", "rollback"])
    up = hook(client, keys, receiver.url + "/up", ["calibration", "rollback"])
    calibrate_and_roll_back(client, keys)
    d = dispatcher(client, send=send)
    now = later()
    assert d.run_once(now) == 3 and sorted(u.rsplit("/", 1)[1] for u in sent) == ["down", "up", "up"]
    assert [x["state"] for x in deliveries(client, keys, up)] == ["delivered", "delivered"]
    assert sorted(x["attempts"] for x in deliveries(client, keys, down)) == [0, 1]


def test_a_receiver_that_always_fails_ends_dead_and_can_be_resent(client: TestClient, keys: Keys,
                                                                  receiver: Receiver) -> None:
    receiver.status = 500
    hid = hook(client, keys, receiver.url, ["calibration"])
    calibrate_and_roll_back(client, keys)
    d = dispatcher(client)
    now = later()
    for _ in range(6):  # more passes than attempts: the 4th failure is the last
        d.run_once(now)
        now += timedelta(hours=1)
    assert len(receiver.received) == 4  # webhook_max_attempts
    # the attempts by outcome, and the outbox by state
    attempts = {o: metric(client, keys, "curvekeeper_webhook_deliveries_total", "outcome", o)
                for o in ("delivered", "failed", "dead")}
    assert attempts == {"delivered": 0.0, "failed": 3.0, "dead": 1.0}
    assert [metric(client, keys, "curvekeeper_webhook_outbox", "state", s) for s in ("pending", "dead")] == [0, 1]
    dead = deliveries(client, keys, hid, "dead")
    assert [(x["attempts"], x["last_status"], x["next_attempt_at"]) for x in dead] == [(4, 500, None)]
    assert deliveries(client, keys, hid, "pending") == []
    receiver.status = 204
    again = ok(client.post(f"{HOOKS}/{hid}/deliveries/{dead[0]['id']}/resend", headers=keys["admin"]), 202)
    assert (again["state"], again["attempts"]) == ("pending", 0)
    assert d.run_once(later(3600 * 7)) == 1
    assert [x["state"] for x in deliveries(client, keys, hid)] == ["delivered"]
    assert len(receiver.received) == 5 and all(r["signed"] for r in receiver.received)
    assert metric(client, keys, "curvekeeper_webhook_deliveries_total", "outcome", "delivered") == 1.0
    assert metric(client, keys, "curvekeeper_webhook_outbox", "state", "dead") == 0.0


def test_backoff_schedule(client: TestClient, keys: Keys, receiver: Receiver) -> None:
    # by hand: base 2 s, attempt n waits 2 * 2**(n-1) s, times 1 + 0.5 * jitter
    assert [backoff(n, 2.0, 0.0) for n in (1, 2, 3, 4, 5)] == [2.0, 4.0, 8.0, 16.0, 32.0]
    assert backoff(3, 2.0, 0.5) == 8.0 * 1.25 and backoff(1, 0.5, 0.999) == pytest.approx(0.74975)
    receiver.status = 503
    hid = hook(client, keys, receiver.url, ["calibration"])
    calibrate_and_roll_back(client, keys)
    d = dispatcher(client)
    now = later()
    for n, wait in ((1, 2.0), (2, 4.0), (3, 8.0)):
        assert d.run_once(now) == 1
        (x,) = deliveries(client, keys, hid)
        due = datetime.fromisoformat(x["next_attempt_at"].replace("Z", "+00:00"))
        assert (x["attempts"], (due - now).total_seconds()) == (n, wait)
        assert d.run_once(due - timedelta(milliseconds=1)) == 0  # not yet due
        now = due


def test_a_restarted_service_loses_nothing(quiet: Settings, keys: Keys, client: TestClient,
                                           receiver: Receiver) -> None:
    hid = hook(client, keys, receiver.url, ["calibration", "rollback"])
    receiver.stop()
    calibrate_and_roll_back(client, keys)
    d = dispatcher(client)
    d.run_once(later())  # fails: the receiver is down
    # a claim whose sender died before recording its outcome
    (first, second) = deliveries(client, keys, hid)
    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    with ctx.work.unit(write=True) as unit:
        assert unit.repo.claim_delivery(second["id"], later(10), later(10) + d.lease)
        assert not unit.repo.claim_delivery(second["id"], later(10), later(10))  # one claim wins
    client.__exit__(None, None, None)  # the service stops
    receiver.start()
    with TestClient(create_app(quiet)) as fresh:
        d2 = dispatcher(fresh)
        d2.run_once(later(30))
        assert [e["kind"] for e in receiver.events()] == ["calibration"]  # the rollback is still claimed
        d2.run_once(later(30) + d.lease)
        assert sorted(e["kind"] for e in receiver.events()) == ["calibration", "rollback"]
        assert {x["state"] for x in deliveries(fresh, keys, hid)} == {"delivered"}
        assert d2.run_once(later(86400)) == 0


def test_the_address_is_checked_again_before_each_send(client: TestClient, keys: Keys) -> None:
    """A name that resolved to a private address when the webhook was made and to a
    metadata address now is not sent to; ``send`` is a recorder: nothing leaves the process."""
    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    with ctx.work.unit(write=True) as unit:
        made = actions.create(unit.repo, url="http://relay.example.org/hook", events=["calibration"],
                              secret=SECRET, allow_link_local=False, resolver=lambda h: ["10.0.0.8"])
    calibrate_and_roll_back(client, keys)
    sent: list[str] = []

    def record(url: str, raw: bytes, headers: dict[str, str], timeout: float, address: str) -> Outcome:
        sent.append(url)
        return Outcome(200)

    def rebound(host: str) -> Iterable[str]:
        return ["169.254.169.254"]
    dispatcher(client, send=record, resolver=rebound).run_once(later())
    assert sent == []
    (x,) = deliveries(client, keys, made["id"])
    assert x["state"] == "pending" and "refused" in x["last_error"]


def test_a_refused_request_queues_nothing(client: TestClient, keys: Keys, receiver: Receiver) -> None:
    hook(client, keys, receiver.url, ["rollback"])
    ok(client.post("/v1/channels", json={"id": CH, **LINEAR}, headers=keys["admin"]), 201)
    expect_error(client, "POST", f"{BASE}/rollback", 404, "snapshot_not_found", json={"snapshot": 12345},
                 headers=keys["technician"])


def test_the_services_loop_runs_passes_between_its_sleeps(client: TestClient, keys: Keys,
                                                          receiver: Receiver) -> None:
    """``run_forever`` (the lifespan's task): a pass after each sleep; the sleep is the test's."""
    hook(client, keys, receiver.url, ["calibration"])
    calibrate_and_roll_back(client, keys)
    slept: list[float] = []

    async def sleep(s: float) -> None:
        slept.append(s)
        if len(slept) == 2:  # the second sleep: after one pass, stop the loop
            raise asyncio.CancelledError

    with pytest.raises(asyncio.CancelledError):
        asyncio.run(dispatcher(client).run_forever(5.0, sleep=sleep))
    assert slept == [5.0, 5.0]
    assert [e["kind"] for e in receiver.events()] == ["calibration"] and receiver.received[0]["signed"]


def test_the_send_goes_to_the_address_that_was_checked(client: TestClient, keys: Keys, receiver: Receiver) -> None:
    """The connection is pinned to the checked address: a name only the test's resolver
    knows (``.invalid`` never resolves, RFC 2606) reaches the receiver on 127.0.0.1, its
    Host header still the URL's."""
    url = f"http://receiver.invalid:{receiver.port}/hook"
    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    with ctx.work.unit(write=True) as unit:
        actions.create(unit.repo, url=url, events=["calibration"], secret=SECRET, allow_link_local=False,
                       resolver=lambda h: ["127.0.0.1"])
    calibrate_and_roll_back(client, keys)
    assert dispatcher(client, resolver=lambda h: ["127.0.0.1"]).run_once(later()) == 1
    assert [(r["host"], r["signed"]) for r in receiver.received] == [(f"receiver.invalid:{receiver.port}", True)]


@pytest.mark.parametrize("url, address, want", [
    ("https://relay.example.org/a?b=1", "10.0.0.8",
     ("https://10.0.0.8/a?b=1", "relay.example.org", "relay.example.org")),
    ("http://relay.example.org:8080/a", "fd12::1", ("http://[fd12::1]:8080/a", "relay.example.org:8080",
                                                    "relay.example.org")),
])
def test_pinned(url: str, address: str, want: tuple[str, str, str]) -> None:
    assert pinned(url, address) == want
