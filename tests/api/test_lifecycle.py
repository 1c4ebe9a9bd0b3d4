"""A channel's lifecycle (``service/curvekeeper/api/routes/lifecycle.py``): acknowledging a
drift warning or alarm, taking a channel out of service and back, and how settings
changes, calibrations and rollbacks treat both.

Grouped per route, unauthorised and bad-input cases first; every failing request is
checked for its status, ``error.code`` and an unchanged store. An alarm is raised the way
a sensor would: a calibration on 20 points with noise of known s.d. (0.05), then samples
offset by ten s.d. from the calibrated line.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error, ok

CH = "site-a.life1"
BASE = f"/v1/channels/{CH}"
ACK = f"{BASE}/acknowledge"
SERVICE = f"{BASE}/service"
EVENTS = f"{BASE}/events"

SD = 0.05  # the noise s.d. of every reference value, output units
NOTE = "door left open during loading; readings checked"
LONGEST = (NOTE + ". ") * 19 + "x" * 69  # the longest note taken, 1000 characters


def line(x: np.ndarray) -> np.ndarray:
    return 3.0 + 0.5 * x


def calibrate(client: TestClient, h: dict[str, str], seed: int = 1) -> dict[str, Any]:
    """A calibration on 20 points over [0, 100] with noise of s.d. ``SD``."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 100.0, 20)
    y = line(x) + rng.normal(0.0, SD, x.size)
    body = {"points": [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]}
    return ok(client.post(f"{BASE}/calibrate", json=body, headers=h))  # type: ignore[no-any-return]


def post(client: TestClient, h: dict[str, str], n: int, offset: float, seed: int = 2) -> dict[str, Any]:
    """``n`` samples off the calibrated line by ``offset`` (output units), noise s.d. ``SD``."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 100.0, n)
    y = line(x) + offset + rng.normal(0.0, SD, n)
    body = {"samples": [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]}
    return ok(client.post(f"{BASE}/samples", json=body, headers=h))  # type: ignore[no-any-return]


def channel(client: TestClient, h: dict[str, str]) -> dict[str, Any]:
    return ok(client.get(BASE, headers=h))  # type: ignore[no-any-return]


def events(client: TestClient, h: dict[str, str], kind: str) -> list[dict[str, Any]]:
    return ok(client.get(EVENTS, params={"kind": kind}, headers=h))["items"]  # type: ignore[no-any-return]


def raise_alarm(client: TestClient, keys: Keys) -> dict[str, Any]:
    """Calibrate, then 100 samples ten s.d. off the line: the drift watch must raise its alarm."""
    calibrate(client, keys["technician"])
    out = post(client, keys["device"], 100, 10 * SD)
    assert out["drift"]["state"] == "alarm", out["drift"]
    return channel(client, keys["technician"])


def predict_y(client: TestClient, h: dict[str, str]) -> list[float]:
    body = {"x": [0.0, 25.0, 50.0, 75.0, 100.0]}
    return ok(client.post(f"{BASE}/predict", json=body, headers=h))["y"]  # type: ignore[no-any-return]


@pytest.fixture
def made(make_channel: Any) -> dict[str, Any]:
    return make_channel(CH)  # type: ignore[no-any-return]


@pytest.fixture
def alarmed(client: TestClient, keys: Keys, made: dict[str, Any]) -> dict[str, Any]:
    return raise_alarm(client, keys)


# POST /v1/channels/{id}/acknowledge ---------------------------------------------------------
def test_acknowledge_without_a_key_is_401(client: TestClient, keys: Keys, alarmed: dict[str, Any]) -> None:
    expect_error(client, "POST", ACK, 401, "unauthorized", json={"note": NOTE})
    expect_error(client, "POST", ACK, 401, "unauthorized", json={"note": NOTE}, headers=keys["revoked"])


def test_acknowledge_with_a_device_key_is_403(client: TestClient, keys: Keys, alarmed: dict[str, Any]) -> None:
    for who in ("device", "other_device"):
        expect_error(client, "POST", ACK, 403, "forbidden", json={"note": NOTE}, headers=keys[who])


def test_acknowledge_bad_body_is_422(client: TestClient, keys: Keys, alarmed: dict[str, Any]) -> None:
    tech = keys["technician"]
    for body in (None, {}, {"note": None}, {"note": ""}, {"note": "   "}, {"note": 5}, {"note": ["x"]},
                 {"note": "checked\nprobe"}, {"note": "checked\x00"}, {"note": "bell\x07"}, {"note": "x" * 1001},
                 {"note": NOTE, "force": True}, [NOTE]):
        expect_error(client, "POST", ACK, 422, "validation_error", json=body, headers=tech)
    expect_error(client, "POST", ACK, 400, "malformed_json", text='{"note": ', headers=tech)
    assert channel(client, tech)["drift"]["state"] == "alarm"


def test_acknowledge_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(client, "POST", "/v1/channels/site-a.nope/acknowledge", 404, "channel_not_found",
                 json={"note": NOTE}, headers=keys["technician"])


def test_acknowledge_without_a_warning_or_alarm_is_409(client: TestClient, keys: Keys,
                                                       made: dict[str, Any]) -> None:
    tech = keys["technician"]
    err = expect_error(client, "POST", ACK, 409, "nothing_to_acknowledge", json={"note": NOTE}, headers=tech)
    assert err["details"] == {"drift_state": "ok"}
    calibrate(client, tech)
    post(client, keys["device"], 50, 0.0)  # samples on the line: nothing to see
    assert channel(client, tech)["drift"]["state"] == "ok"
    expect_error(client, "POST", ACK, 409, "nothing_to_acknowledge", json={"note": NOTE}, headers=tech)


def test_acknowledge_clears_the_alarm_and_the_audit_lists_it(client: TestClient, keys: Keys,
                                                             alarmed: dict[str, Any]) -> None:
    tech = keys["technician"]
    statistic = alarmed["drift"]["statistic"]
    assert statistic > alarmed["drift"]["alarm"]
    assert len(LONGEST) == 1000
    out = ok(client.post(ACK, json={"note": LONGEST}, headers=tech))
    assert out["drift"]["state"] == "ok" and out["drift"]["statistic"] == 0.0
    assert out["version"] == alarmed["version"] + 1 and out["n_samples"] == alarmed["n_samples"]
    assert channel(client, tech) == out
    (event,) = events(client, tech, "acknowledged")
    assert event["version"] == out["version"]
    assert event["details"] == {"note": LONGEST, "drift_state": "alarm", "statistic": statistic}
    # the technician's key, the one that calibrated
    assert event["key_id"] == events(client, tech, "calibration")[0]["key_id"]
    trail = ok(client.get("/v1/audit", params={"kind": "acknowledged"}, headers=keys["admin"]))["items"]
    assert [(e["channel"], e["key_id"], e["details"]) for e in trail] == [(CH, event["key_id"], event["details"])]
    assert NOTE in trail[0]["summary"] and "alarm" in trail[0]["summary"]
    # cleared: a second acknowledgement has nothing to clear
    expect_error(client, "POST", ACK, 409, "nothing_to_acknowledge", json={"note": NOTE}, headers=keys["admin"])


def test_acknowledge_clears_a_warning(client: TestClient, keys: Keys, made: dict[str, Any]) -> None:
    tech = keys["technician"]
    calibrate(client, tech)
    # one sample at a time, two s.d. off the line: the watch passes through its warning
    for i in range(200):
        state = post(client, keys["device"], 1, 2 * SD, seed=100 + i)["drift"]["state"]
        if state != "ok":
            break
    assert state == "warning"
    statistic = channel(client, tech)["drift"]["statistic"]
    out = ok(client.post(ACK, json={"note": NOTE}, headers=keys["admin"]))
    assert out["drift"]["state"] == "ok"
    assert events(client, tech, "acknowledged")[0]["details"] == {"note": NOTE, "drift_state": "warning",
                                                                  "statistic": statistic}


def test_an_alarm_stays_through_settings_changes(client: TestClient, keys: Keys, alarmed: dict[str, Any]) -> None:
    tech = keys["technician"]
    for change in ({"drift": {"tolerance": 1.0}}, {"drift": {"alarm": 500.0}}, {"drift": {"tolerance": None}},
                   {"learner": {"kind": "rls"}}):
        out = ok(client.patch(BASE, json=change, headers=tech))
        assert out["drift"]["state"] == "alarm", change
    assert out["drift"]["alarm"] == 500.0 and out["drift"]["statistic"] < 500.0  # the statistic restarted
    assert events(client, tech, "drift_ok") == []
    assert ok(client.post(ACK, json={"note": NOTE}, headers=tech))["drift"]["state"] == "ok"


def test_a_calibration_clears_the_alarm(client: TestClient, keys: Keys, alarmed: dict[str, Any]) -> None:
    tech = keys["technician"]
    calibrate(client, tech, seed=3)
    assert channel(client, tech)["drift"]["state"] == "ok"
    assert events(client, tech, "acknowledged") == []
    expect_error(client, "POST", ACK, 409, "nothing_to_acknowledge", json={"note": NOTE}, headers=tech)


# POST /v1/channels/{id}/service -------------------------------------------------------------
OUT = {"state": "out_of_service", "note": "probe sent for repair"}
IN = {"state": "in_service", "note": "probe back, checked at two points"}


def test_service_without_a_key_is_401(client: TestClient, keys: Keys, made: dict[str, Any]) -> None:
    expect_error(client, "POST", SERVICE, 401, "unauthorized", json=OUT)
    expect_error(client, "POST", SERVICE, 401, "unauthorized", json=OUT, headers=keys["revoked"])


def test_service_with_a_device_key_is_403(client: TestClient, keys: Keys, made: dict[str, Any]) -> None:
    for who in ("device", "other_device"):
        expect_error(client, "POST", SERVICE, 403, "forbidden", json=OUT, headers=keys[who])


def test_service_bad_body_is_422(client: TestClient, keys: Keys, made: dict[str, Any]) -> None:
    tech = keys["technician"]
    for body in (None, {}, {"state": "out_of_service"}, {"note": "x"}, {**OUT, "state": "broken"},
                 {**OUT, "state": "OUT_OF_SERVICE"}, {**OUT, "state": None}, {**OUT, "state": 0},
                 {**OUT, "note": ""}, {**OUT, "note": "a\tb"}, {**OUT, "note": "\x1b[31m"}, {**OUT, "note": "x" * 1001},
                 {**OUT, "until": "2030-01-01T00:00:00Z"}, [OUT]):
        expect_error(client, "POST", SERVICE, 422, "validation_error", json=body, headers=tech)
    expect_error(client, "POST", SERVICE, 400, "malformed_json", text='{"state": ', headers=tech)


def test_service_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(client, "POST", "/v1/channels/site-a.nope/service", 404, "channel_not_found", json=OUT,
                 headers=keys["technician"])


def test_service_unchanged_is_409(client: TestClient, keys: Keys, made: dict[str, Any]) -> None:
    tech = keys["technician"]
    err = expect_error(client, "POST", SERVICE, 409, "service_unchanged", json=IN, headers=tech)
    assert err["details"] == {"service_state": "in_service"}
    ok(client.post(SERVICE, json=OUT, headers=tech))
    expect_error(client, "POST", SERVICE, 409, "service_unchanged", json=OUT, headers=keys["admin"])


def test_out_of_service_samples_are_stored_not_learned(client: TestClient, keys: Keys,
                                                       made: dict[str, Any]) -> None:
    tech, dev = keys["technician"], keys["device"]
    assert made["service_state"] == "in_service"
    calibrate(client, tech)
    post(client, dev, 20, 0.0)
    before = channel(client, tech)
    y_before = predict_y(client, dev)
    out = ok(client.post(SERVICE, json=OUT, headers=tech))
    assert out["service_state"] == "out_of_service" and out["version"] == before["version"] + 1
    assert channel(client, tech) == out
    (event,) = events(client, tech, "service_changed")
    assert event["details"] == {"from": "in_service", "to": "out_of_service", "note": OUT["note"]}
    assert event["version"] == out["version"] and event["key_id"]

    # ten s.d. off the line, the alarm's recipe: stored, neither learned nor watched
    got = post(client, dev, 100, 10 * SD, seed=5)
    assert got["accepted"] == 0
    assert got["rejected"] == [{"index": i, "reason": "out_of_service"} for i in range(100)]
    assert got["drift"]["state"] == "ok"
    now = channel(client, tech)
    assert now["n_samples"] == before["n_samples"] + 100 and now["n_rejected"] == before["n_rejected"] + 100
    assert now["drift"] == before["drift"] and now["rmse"] == before["rmse"]
    assert predict_y(client, dev) == y_before  # the curve did not move, to the last bit
    stored = ok(client.get(f"{BASE}/samples", params={"limit": 1000}, headers=tech))["items"]
    assert len(stored) == now["n_samples"]
    assert all(not s["accepted"] and s["reason"] == "out_of_service" for s in stored[-100:])
    trail = ok(client.get("/v1/audit", params={"kind": "service_changed"}, headers=keys["admin"]))["items"]
    assert "out of service" in trail[0]["summary"] and OUT["note"] in trail[0]["summary"]

    # back in service by the route: samples are learned again
    back = ok(client.post(SERVICE, json=IN, headers=keys["admin"]))
    assert back["service_state"] == "in_service"
    assert [e["details"]["to"] for e in events(client, tech, "service_changed")] == ["out_of_service", "in_service"]
    assert post(client, dev, 10, 0.0, seed=6)["accepted"] == 10
    assert predict_y(client, dev) != y_before


def test_a_calibration_returns_the_channel_to_service(client: TestClient, keys: Keys, made: dict[str, Any]) -> None:
    tech = keys["technician"]
    ok(client.post(SERVICE, json=OUT, headers=tech))
    assert post(client, keys["device"], 5, 0.0)["accepted"] == 0
    calibrate(client, tech)
    assert channel(client, tech)["service_state"] == "in_service"
    assert post(client, keys["device"], 5, 0.0, seed=7)["accepted"] == 5
    expect_error(client, "POST", SERVICE, 409, "service_unchanged", json=IN, headers=tech)


def test_an_alarm_stays_out_of_service_and_can_be_acknowledged(client: TestClient, keys: Keys,
                                                                alarmed: dict[str, Any]) -> None:
    tech = keys["technician"]
    assert ok(client.post(SERVICE, json=OUT, headers=tech))["drift"]["state"] == "alarm"
    out = ok(client.post(ACK, json={"note": NOTE}, headers=tech))
    assert out["drift"]["state"] == "ok" and out["service_state"] == "out_of_service"


def test_the_channel_list_shows_the_service_state(client: TestClient, keys: Keys, made: dict[str, Any],
                                                  make_channel: Any) -> None:
    tech = keys["technician"]
    make_channel("site-a.life2")
    ok(client.post(SERVICE, json=OUT, headers=tech))
    items = ok(client.get("/v1/channels", headers=tech))["items"]
    assert {c["id"]: c["service_state"] for c in items} == {CH: "out_of_service", "site-a.life2": "in_service"}
