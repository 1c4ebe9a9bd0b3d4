"""Oversized bodies are refused by item count before validation, and large ones are
validated in a worker thread, never on the event loop.

An oversized body whose last item is also invalid tells the order apart: a count checked
first answers 413 (payload_too_large); a count checked after validation answers 422.
"""

from __future__ import annotations

import asyncio
import gc
import json
import sqlite3
import threading
import time
from collections.abc import Callable
from typing import Any

import pytest
from curvekeeper.actions import samples as samples_actions
from curvekeeper.api import bodies, create_app
from curvekeeper.api.routes.curves import MAX_POINTS
from curvekeeper.config import Settings
from curvekeeper.errors import PayloadTooLarge, StoreBusy
from curvekeeper.store import Store
from curvekeeper.store.engine import SQLITE_CONNECTIONS
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error

Make = Callable[..., dict[str, Any]]
SAMPLES = "/v1/channels/site-a.p1/samples"


def _oversized(n: int, item: Any, bad: Any) -> list[Any]:
    return [item] * (n - 1) + [bad]


def test_too_many_samples_are_refused_before_validation(client: TestClient, keys: Keys, make_channel: Make,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    make_channel()
    validated: list[Any] = []
    monkeypatch.setattr(bodies, "validate_body", lambda raw, model, key=None: validated.append(model))
    n = client.app.state.ctx.settings.max_batch + 1  # type: ignore[attr-defined]
    body = {"samples": _oversized(n, {"x": 1.0, "y": 2.0}, {"x": 1.0, "y": "not a number"})}
    err = expect_error(client, "POST", SAMPLES, 413, "payload_too_large", json=body, headers=keys["device"])
    assert err["details"] == {"max_batch": n - 1}
    expect_error(client, "POST", "/v1/samples", 413, "payload_too_large", headers=keys["device"],
                 json={"samples": _oversized(n, {"channel": "site-a.p1", "x": 1.0, "y": 2.0}, {"channel": 7})})
    assert validated == []  # no model was built for either body


def test_too_many_predict_values_are_refused_before_validation(client: TestClient, keys: Keys,
                                                               make_channel: Make) -> None:
    make_channel()
    n = client.app.state.ctx.settings.max_predict + 1  # type: ignore[attr-defined]
    err = expect_error(client, "POST", "/v1/channels/site-a.p1/predict", 413, "payload_too_large",
                       json={"x": _oversized(n, 1.0, "bad")}, headers=keys["device"])
    assert err["details"] == {"max_predict": n - 1}


def test_too_many_calibration_points_are_refused_before_validation(client: TestClient, keys: Keys,
                                                                   make_channel: Make) -> None:
    make_channel()
    points = _oversized(MAX_POINTS + 1, {"x": 1.0, "y": 2.0}, {"x": 1.0})
    expect_error(client, "POST", "/v1/channels/site-a.p1/calibrate", 413, "payload_too_large",
                 json={"points": points}, headers=keys["technician"])


def test_a_large_body_is_validated_in_a_worker_thread(client: TestClient, keys: Keys, make_channel: Make,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    make_channel()
    on_loop: dict[int, bool] = {}
    real = bodies.validate_body

    def spy(raw: Any, model: Any, key: str | None = None) -> Any:
        try:
            asyncio.get_running_loop()
            on_loop[bodies.count_items(raw, "samples")] = True
        except RuntimeError:  # no loop runs in this thread: a worker thread
            on_loop[bodies.count_items(raw, "samples")] = False
        return real(raw, model, key)

    monkeypatch.setattr(bodies, "validate_body", spy)
    big = bodies.INLINE_MAX_BODY_ITEMS + 1
    for n in (1, big):
        r = client.post(SAMPLES, json={"samples": [{"x": float(i), "y": 2.0 * i} for i in range(n)]},
                        headers=keys["device"])
        assert r.status_code == 200, r.text[:300]
    assert on_loop == {1: True, big: False}


def test_a_bad_item_in_an_allowed_body_names_its_field(client: TestClient, keys: Keys, make_channel: Make) -> None:
    make_channel()
    n = bodies.INLINE_MAX_BODY_ITEMS + 5  # validated in a worker thread: the same 422 as on the loop
    body = {"samples": _oversized(n, {"x": 1.0, "y": 2.0}, {"x": 1.0, "y": "bad"})}
    err = expect_error(client, "POST", SAMPLES, 422, "validation_error", json=body, headers=keys["device"])
    assert any(d["loc"] == ["body", "samples", str(n - 1), "y"] for d in err["details"]), err


def test_a_long_list_validated_in_slices_is_the_same_list(client: TestClient, keys: Keys, make_channel: Make) -> None:
    """Predict's x (numbers, or lists of numbers) is validated slice by slice: the answer
    covers every value in order, and a bad value in a later slice is named by its index."""
    make_channel()
    n = 3 * bodies.VALIDATE_SLICE + 7
    xs = [float(i) for i in range(n)]
    url = "/v1/channels/site-a.p1/predict"
    bench = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 26.0}, {"x": 100.0, "y": 51.2}]}
    assert client.post("/v1/channels/site-a.p1/calibrate", json=bench, headers=keys["technician"]).status_code == 200
    r = client.post(url, json={"x": xs}, headers=keys["device"])
    assert r.status_code == 200 and r.json()["y"] == client.post(url, json={"x": [[v] for v in xs]},
                                                                  headers=keys["device"]).json()["y"]
    assert len(r.json()["y"]) == n
    err = expect_error(client, "POST", url, 422, "validation_error", headers=keys["device"],
                       json={"x": [[v] for v in xs[:-1]] + [3.0]})
    assert err["details"][0]["loc"] == ["body", "x", str(n - 1)], err


# an rls channel of 120 basis terms (three inputs, degree 7): its state holds a 120x120 covariance
BIG_RLS = {"inputs": [{"name": n, "unit": "V", "min": 0.0, "max": 1.0} for n in ("a", "b", "c")],
           "output": {"unit": "V"},
           "basis": {"kind": "poly", "degree": 7}, "learner": {"kind": "rls"}}


def test_snapshot_every_of_a_large_rls_channel_has_a_floor(client: TestClient, admin: dict[str, str]) -> None:
    err = expect_error(client, "POST", "/v1/channels", 422, "validation_error", headers=admin,
                       json={"id": "site-a.big", **BIG_RLS, "snapshot_every": 56})
    assert [d["loc"] for d in err["details"]] == [["body", "snapshot_every"]], err
    assert "at least 57" in err["message"]
    r = client.post("/v1/channels", json={"id": "site-a.big", **BIG_RLS, "snapshot_every": 57}, headers=admin)
    assert r.status_code == 201, r.text


@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)  # PostgreSQL work never runs on the loop
def test_costly_learning_runs_in_a_worker_thread(client: TestClient, keys: Keys, make_channel: Make,
                                                 admin: dict[str, str], monkeypatch: pytest.MonkeyPatch) -> None:
    """Ten samples of a small channel are learned on the event loop; ten of the 120-term rls
    channel cost about 2,000 small ones and are learned in a worker thread."""
    make_channel()
    assert client.post("/v1/channels", json={"id": "site-a.big", **BIG_RLS}, headers=admin).status_code == 201
    done: list[bool] = []
    real = samples_actions.ingest_channel

    def spy(unit: Any, st: Any, items: Any, *args: Any) -> Any:
        out = real(unit, st, items, *args)  # raises when over the loop's budget: not recorded
        try:
            asyncio.get_running_loop()
            done.append(True)
        except RuntimeError:  # no loop runs in this thread: a worker thread
            done.append(False)
        return out

    monkeypatch.setattr(samples_actions, "ingest_channel", spy)
    ten = [{"x": [0.1 * i, 0.2, 0.3], "y": float(i)} for i in range(10)]
    r = client.post(SAMPLES, json={"samples": [{"x": 0.1 * i, "y": float(i)} for i in range(10)]},
                    headers=keys["device"])
    assert r.status_code == 200, r.text
    r = client.post("/v1/channels/site-a.big/samples", json={"samples": ten}, headers=keys["device"])
    assert r.status_code == 200 and r.json()["accepted"] == 10, r.text
    assert done == [True, False]


@pytest.mark.parametrize("text", [
    '{"samples": [{"x": 1, "y": 2}, {"x": [1.5, -2e3], "y": 3, "t": "2026-01-01T00:00:00Z"}], "source": "gw"}',
    ' \n{ "source" : null , "samples" : [ ] }\t', '{"samples": 5}', '{"samples": [[1, [2]], "a\\"]"], "x": {}}',
    '{}', '{"samples": [1], "samples": [2, 3]}', '{"samples": [NaN, Infinity]}', '{"é": ["\\u00e9"]}'])
def test_parse_counted_reads_json_as_json_loads_does(text: str) -> None:
    assert bodies.parse_counted(text.encode(), "samples", 10, "max_batch", "samples") == json.loads(text)


@pytest.mark.parametrize("text", ['{"samples": [1,]}', '{"samples": [1] ,}', '[1, 2]', '{"samples": [1]} x',
                                  '{"samples": [1 2]}', '{1: 2}', '{"samples" [1]}', '{"samples": [1]', '\xff'])
def test_parse_counted_leaves_what_is_not_a_json_object_to_fastapi(text: str) -> None:
    with pytest.raises(bodies._Unparsed):
        bodies.parse_counted(text.encode("latin-1"), "samples", 10, "max_batch", "samples")


def test_parse_counted_stops_past_the_cap() -> None:
    with pytest.raises(PayloadTooLarge) as exc:
        bodies.parse_counted(b'{"samples": [1, 2, 3, this is never read', "samples", 2, "max_batch", "samples")
    assert exc.value.details == {"max_batch": 2}


def test_a_small_body_with_too_many_items_is_refused_before_validation(settings: Settings, admin: dict[str, str],
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """Under ``PARSE_INLINE_BYTES`` FastAPI parses the body; the route counts before validating."""
    validated: list[Any] = []
    monkeypatch.setattr(bodies, "validate_body", lambda raw, model, key=None: validated.append(model))
    with TestClient(create_app(settings.with_(max_batch=3, max_predict=3))) as c:
        body = {"samples": _oversized(4, {"x": 1.0, "y": 2.0}, {"x": 1.0, "y": "bad"})}
        err = expect_error(c, "POST", SAMPLES, 413, "payload_too_large", json=body, headers=admin)
        assert err["details"] == {"max_batch": 3}
        expect_error(c, "POST", "/v1/channels/site-a.p1/predict", 413, "payload_too_large",
                     json={"x": [1.0, 2.0, 3.0, "bad"]}, headers=admin)
    assert validated == []


def test_paused_gc_nests_and_restores_the_collector() -> None:
    was = gc.isenabled()
    try:
        gc.enable()
        with bodies.paused_gc():
            with bodies.paused_gc():
                assert not gc.isenabled()
            assert not gc.isenabled()  # still inside the outer block
        assert gc.isenabled()
        gc.disable()
        with bodies.paused_gc():
            pass
        assert not gc.isenabled()  # off before: stays off
    finally:
        (gc.enable if was else gc.disable)()


# the store under a held write lock (SQLite) ------------------------------------------------

@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)
def test_a_write_waits_for_the_lock_only_until_its_deadline(database_url: str) -> None:
    """A deadline already past: the write answers store_busy at once, not after the busy
    timeout (a request that queued that long for a worker thread has used up its wait)."""
    store = Store(database_url, busy_timeout_s=30.0)
    held = sqlite3.connect(database_url.removeprefix("sqlite:///"), isolation_level=None, check_same_thread=False)
    try:
        held.execute("BEGIN IMMEDIATE")
        # the lock comes free well within the busy timeout: a write waiting that long would get it
        release = threading.Timer(0.5, held.execute, ("ROLLBACK",))
        release.start()
        with pytest.raises(StoreBusy), store.transaction(write=True, deadline=time.monotonic() - 1.0) as repo:
            repo.channel_and_state("nowhere")
        release.join()
        with store.transaction(write=True, deadline=time.monotonic() + 30.0) as repo:  # free: taken at once
            assert repo.channel_and_state("nowhere") is None
    finally:
        held.close()
        store.dispose()


@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)
def test_the_event_loop_has_a_connection_of_its_own(database_url: str) -> None:
    """Every pooled connection taken by worker threads (waiting for a held lock, say): work
    on the loop (``wait=False``) still gets a connection without waiting for one."""
    store = Store(database_url, busy_timeout_s=2.0)
    taken = [store.engine.connect() for _ in range(SQLITE_CONNECTIONS)]
    try:
        with store.transaction(write=False, wait=False) as repo:
            assert repo.channel_and_state("nowhere") is None
        with store.transaction(write=True, wait=False) as repo:
            assert repo.channel_and_state("nowhere") is None
    finally:
        for conn in taken:
            conn.close()
        store.dispose()
