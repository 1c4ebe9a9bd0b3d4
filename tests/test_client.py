"""``curvekeeper.client``: the routes through the in-process app (an ``httpx.MockTransport``
that forwards to the ``client`` fixture's app, on each backend), and the retry rules with
transports that fail on purpose. Delays go through a fake ``sleep`` that only records
them, so no test waits."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta
from email.utils import format_datetime
from typing import Any

import httpx
import pytest
from curvekeeper.client import Client, ClientError, retry_after
from curvekeeper.store.tables import Sample
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from tests.conftest import ADMIN_SECRET, LINEAR, store_fingerprint

Handler = Callable[[httpx.Request], httpx.Response]
BASE = "http://testserver"


def forward(app_client: TestClient) -> Handler:
    """A MockTransport handler that sends the request to the in-process app."""
    def handler(request: httpx.Request) -> httpx.Response:
        r = app_client.request(request.method, request.url.raw_path.decode(), content=request.content,
                               headers=dict(request.headers))
        return httpx.Response(r.status_code, headers=r.headers, content=r.content)
    return handler


class Recorder:
    """Counts requests and records the delays the client asked to sleep (seconds)."""

    def __init__(self) -> None:
        self.calls = 0
        self.sleeps: list[float] = []

    def sleep(self, seconds: float) -> None:
        self.sleeps.append(seconds)


def make(handler: Handler, rec: Recorder, **kw: Any) -> Client:
    def counted(request: httpx.Request) -> httpx.Response:
        rec.calls += 1
        return handler(request)
    return Client(BASE, ADMIN_SECRET, transport=httpx.MockTransport(counted), sleep=rec.sleep, seed=7, **kw)


def busy(status: int = 503, after: str = "2") -> httpx.Response:
    body = {"error": {"code": "store_busy" if status == 503 else "rate_limited",
                      "message": "the store is busy or unavailable; retry shortly", "details": None}}
    return httpx.Response(status, json=body, headers={"Retry-After": after})


def fail_first(n: int, first: Callable[[httpx.Request], httpx.Response], then: Handler) -> Handler:
    """Answer (or raise) with ``first`` for the first ``n`` requests, then with ``then``."""
    seen = 0

    def handler(request: httpx.Request) -> httpx.Response:
        nonlocal seen
        seen += 1
        return first(request) if seen <= n else then(request)
    return handler


def samples(seqs: range) -> list[dict[str, Any]]:
    return [{"x": float(i), "y": 2.0 * i + 1.0, "seq": i} for i in seqs]


def stored(app_client: TestClient, channel: str = "site-a.p1") -> int:
    store = app_client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        ch = repo.get_channel(channel)
        assert ch is not None
        return int(repo.session.scalar(select(func.count()).select_from(Sample)
                                       .where(Sample.channel_pk == ch.pk)) or 0)


@pytest.fixture
def app(client: TestClient) -> Iterator[TestClient]:
    """The in-process app with one channel, ``site-a.p1`` (linear, x in mV, y in kPa)."""
    r = client.post("/v1/channels", json={"id": "site-a.p1", **LINEAR},
                    headers={"Authorization": f"Bearer {ADMIN_SECRET}"})
    assert r.status_code == 201, r.text
    yield client


# --------------------------------------------------------------------------------------
# errors that are never retried


def test_a_422_raises_at_once_with_the_error_code(app: TestClient) -> None:
    rec = Recorder()
    before = store_fingerprint(app)
    with make(forward(app), rec) as c, pytest.raises(ClientError) as err:
        c.post_samples("site-a.p1", [{"x": [1.0, 2.0], "y": 1.0, "seq": 1}], source="dev")
    assert err.value.status == 422 and err.value.code == "invalid_request"
    assert rec.calls == 1 and rec.sleeps == []
    assert store_fingerprint(app) == before


def test_unauthorised_and_missing_channel_are_not_retried(app: TestClient) -> None:
    rec = Recorder()
    with Client(BASE, "ck_wrong-secret-000000000000", transport=httpx.MockTransport(forward(app)),
                sleep=rec.sleep) as c, pytest.raises(ClientError) as err:
        c.get_channel("site-a.p1")
    assert (err.value.status, err.value.code) == (401, "unauthorized") and rec.sleeps == []
    with make(forward(app), rec) as c, pytest.raises(ClientError) as err:
        c.predict("site-a.nope", [1.0])
    assert (err.value.status, err.value.code) == (404, "channel_not_found") and rec.calls == 1


def test_a_500_is_not_retried() -> None:
    rec = Recorder()
    answer = httpx.Response(500, json={"error": {"code": "internal_error", "message": "boom", "details": None}})
    with make(lambda _: answer, rec) as c, pytest.raises(ClientError) as err:
        c.get_channel("site-a.p1")
    assert (err.value.status, err.value.code, rec.calls) == (500, "internal_error", 1)


def test_an_error_without_the_contract_body_still_raises_typed() -> None:
    rec = Recorder()
    with make(lambda _: httpx.Response(404, text="nothing here"), rec) as c, pytest.raises(ClientError) as err:
        c.get_channel("site-a.p1")
    assert (err.value.status, err.value.code, err.value.message) == (404, "http_error", "nothing here")


# --------------------------------------------------------------------------------------
# retries


def test_a_503_with_retry_after_is_retried_after_at_least_that_long(app: TestClient) -> None:
    rec = Recorder()
    with make(fail_first(2, lambda _: busy(after="2"), forward(app)), rec) as c:
        out = c.post_samples("site-a.p1", samples(range(1, 6)), source="dev")
    assert out["accepted"] == 5 and out["duplicates"] == 0
    assert rec.calls == 3 and len(rec.sleeps) == 2 and all(s >= 2.0 for s in rec.sleeps)
    assert c.retries == 2
    assert stored(app) == 5


def test_a_429_is_retried_and_so_is_a_snapshot_the_server_refused(app: TestClient) -> None:
    rec = Recorder()
    with make(fail_first(1, lambda _: busy(429, after="1"), forward(app)), rec) as c:
        snap = c.take_snapshot("site-a.p1", label="bench")
    assert snap["label"] == "bench" and rec.calls == 2 and rec.sleeps[0] >= 1.0
    listed = app.get("/v1/channels/site-a.p1/snapshots", headers={"Authorization": f"Bearer {ADMIN_SECRET}"})
    assert [s["id"] for s in listed.json()["items"]] == [snap["id"]]


def test_retries_give_up_with_the_last_answer() -> None:
    rec = Recorder()
    with make(lambda _: busy(after="0"), rec, max_retries=3) as c, pytest.raises(ClientError) as err:
        c.predict("site-a.p1", [1.0])
    assert (err.value.status, err.value.code) == (503, "store_busy")
    assert rec.calls == 4 and len(rec.sleeps) == 3


def test_a_lost_answer_to_a_keyed_sample_post_is_retried_and_stored_once(app: TestClient) -> None:
    """The first attempt reaches the server and is stored, then its answer is lost (a read
    timeout): the retry finds the samples stored and reports them as duplicates."""
    rec = Recorder()
    to_app = forward(app)

    def deliver_then_time_out(request: httpx.Request) -> httpx.Response:
        to_app(request)
        raise httpx.ReadTimeout("answer lost", request=request)

    with make(fail_first(1, deliver_then_time_out, to_app), rec) as c:
        out = c.post_samples("site-a.p1", samples(range(1, 4)), source="dev")
    assert (out["accepted"], out["duplicates"], out["n_samples"]) == (0, 3, 3)
    assert stored(app) == 3 and rec.calls == 2


def test_a_lost_answer_is_not_retried_when_a_retry_could_store_twice(app: TestClient) -> None:
    """Without source + seq, or for a snapshot, an unknown outcome is the caller's call."""
    def lost(request: httpx.Request) -> httpx.Response:
        raise httpx.ReadError("connection reset", request=request)

    rec = Recorder()
    with make(lost, rec) as c:
        with pytest.raises(ClientError) as err:
            c.post_samples("site-a.p1", [{"x": 1.0, "y": 3.0}], source="dev")
        assert err.value.status is None and err.value.code == "unreachable"
        with pytest.raises(ClientError):
            c.take_snapshot("site-a.p1")
        with pytest.raises(ClientError):
            c.rollback("site-a.p1", 1)
    assert rec.calls == 3 and rec.sleeps == []


def test_a_refused_connection_is_retried_even_for_a_rollback(app: TestClient) -> None:
    def refused(request: httpx.Request) -> httpx.Response:
        raise httpx.ConnectError("connection refused", request=request)

    rec = Recorder()
    with make(forward(app), rec) as c:
        snap = c.take_snapshot("site-a.p1")
    with make(fail_first(2, refused, forward(app)), rec) as c:
        out = c.rollback("site-a.p1", snap["id"])
    assert out["restored_snapshot"] == snap["id"] and rec.sleeps and len(rec.sleeps) == 2


def test_an_unreachable_server_raises_unreachable_after_the_retries() -> None:
    def refused(request: httpx.Request) -> httpx.Response:
        raise httpx.ConnectError("connection refused", request=request)

    rec = Recorder()
    with make(refused, rec, max_retries=2) as c, pytest.raises(ClientError) as err:
        c.get_channel("site-a.p1")
    assert (err.value.status, err.value.code, rec.calls) == (None, "unreachable", 3)


def test_backoff_doubles_up_to_the_cap_with_seeded_jitter() -> None:
    a = Client(BASE, "k", backoff=0.1, max_backoff=1.0, seed=3)
    b = Client(BASE, "k", backoff=0.1, max_backoff=1.0, seed=3)
    try:
        da = [a.delay(i) for i in range(8)]
        assert da == [b.delay(i) for i in range(8)]
    finally:
        a.close()
        b.close()
    for i, d in enumerate(da):
        step = min(1.0, 0.1 * 2 ** i)
        assert step / 2 <= d <= step


def test_retry_after_as_seconds_or_an_http_date() -> None:
    assert retry_after(httpx.Response(503, headers={"Retry-After": "3"})) == 3.0
    later = format_datetime(datetime.now(UTC) + timedelta(seconds=120), usegmt=True)
    assert 100 < (retry_after(httpx.Response(503, headers={"Retry-After": later})) or 0) <= 120
    assert retry_after(httpx.Response(503, headers={"Retry-After": "soon"})) is None
    assert retry_after(httpx.Response(503)) is None


# --------------------------------------------------------------------------------------
# the routes


def test_the_routes_through_the_app(app: TestClient) -> None:
    rec = Recorder()
    with make(forward(app), rec) as c:
        made = c.create_channel({"id": "site-a.p2", **LINEAR})
        assert made["id"] == "site-a.p2" and made["n_samples"] == 0
        with pytest.raises(ClientError) as err:
            c.create_channel({"id": "site-a.p2", **LINEAR})
        assert (err.value.status, err.value.code) == (409, "channel_exists")
        first = c.post_samples("site-a.p2", samples(range(1, 41)), source="dev")
        assert (first["accepted"], first["n_samples"]) == (40, 40)
        again = c.post_samples("site-a.p2", samples(range(31, 51)), source="dev")
        assert (again["accepted"], again["duplicates"], again["n_samples"]) == (10, 10, 50)
        gw = c.post_gateway([{"channel": "site-a.p1", "x": 1.0, "y": 3.0, "seq": 1},
                             {"channel": "site-a.p2", "x": 2.0, "y": 5.0, "seq": 99}], source="gw")
        assert gw["accepted"] == 2 and set(gw["channels"]) == {"site-a.p1", "site-a.p2"}
        snap = c.take_snapshot("site-a.p2", label="after 51")
        c.post_samples("site-a.p2", samples(range(100, 110)), source="dev")
        at_snap = c.predict("site-a.p2", [10.0, 50.0], snapshot=snap["id"])
        back = c.rollback("site-a.p2", snap["id"])
        assert back["restored_snapshot"] == snap["id"] and back["snapshot_before"] > snap["id"]
        now = c.predict("site-a.p2", [10.0, 50.0])
        assert now["y"] == at_snap["y"] and now["k"] == at_snap["k"]
        assert c.get_channel("site-a.p2")["n_samples"] == 61
    assert rec.sleeps == [] and c.retries == 0
