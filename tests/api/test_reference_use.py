"""Reference instruments in use: samples that name one (and channels that require it),
calibrations against one (overdue only when allowed), and the channel's uncertainty taking
the instrument's U and k."""

from __future__ import annotations

import csv
import io
import math
from datetime import timedelta
from typing import Any

from curvekeeper.actions.replay import replay
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error, ok
from tests.api.test_references import REFS, body, make, today

CH = "site-a.p1"
SAMPLES = f"/v1/channels/{CH}/samples"
CALIBRATE = f"/v1/channels/{CH}/calibrate"
POINTS = [{"x": 0.0, "y": 1.0}, {"x": 25.0, "y": 51.2}, {"x": 50.0, "y": 100.7}, {"x": 75.0, "y": 151.1},
          {"x": 100.0, "y": 200.8}]


def overdue_body(rid: str) -> dict[str, Any]:
    return body(rid, calibrated_on=(today() - timedelta(days=400)).isoformat(),
                due_on=(today() - timedelta(days=5)).isoformat())


# samples ---------------------------------------------------------------------------------------------
def test_samples_naming_an_unknown_or_retired_reference_store_nothing(client: TestClient, keys: Keys,
                                                                     make_channel: Any) -> None:
    make_channel(CH)
    h = keys["technician"]
    make(client, h, "ref.old")
    ok(client.patch(f"{REFS}/ref.old", json={"retired": True}, headers=h))
    dev = keys["device"]
    one = [{"x": 1.0, "y": 2.0}]
    expect_error(client, "POST", SAMPLES, 404, "reference_not_found", headers=dev,
                 json={"samples": [{"x": 1.0, "y": 2.0, "reference": "no.such"}]})
    expect_error(client, "POST", SAMPLES, 404, "reference_not_found", headers=dev,
                 json={"reference": "no.such", "samples": one})
    expect_error(client, "POST", SAMPLES, 409, "reference_retired", headers=dev,
                 json={"reference": "ref.old", "samples": one})
    expect_error(client, "POST", "/v1/samples", 409, "reference_retired", headers=dev,
                 json={"samples": [{"channel": CH, "x": 1.0, "y": 2.0, "reference": "ref.old"}]})
    expect_error(client, "POST", SAMPLES, 422, "validation_error", headers=dev,
                 json={"samples": [{"x": 1.0, "y": 2.0, "reference": "Not An Id"}]})


def test_samples_keep_their_reference_and_export_it(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel(CH)
    make(client, keys["technician"], "ref.a")
    make(client, keys["technician"], "ref.b")
    dev = keys["device"]
    ok(client.post(SAMPLES, headers=dev, json={"reference": "ref.a", "samples": [
        {"x": 1.0, "y": 2.0}, {"x": 2.0, "y": 4.0, "reference": "ref.b"}]}))
    ok(client.post(SAMPLES, headers=dev, json={"samples": [{"x": 3.0, "y": 6.0}]}))
    ok(client.post("/v1/samples", headers=dev, json={"reference": "ref.b", "samples": [
        {"channel": CH, "x": 4.0, "y": 8.0}]}))
    rows = ok(client.get(SAMPLES, headers=keys["technician"]))["items"]
    assert [r["reference"] for r in rows] == ["ref.a", "ref.b", None, "ref.b"]
    text = client.get(SAMPLES, headers=keys["technician"], params={"format": "csv"}).text
    table = list(csv.DictReader(io.StringIO(text)))
    assert [r["reference"] for r in table] == ["ref.a", "ref.b", "", "ref.b"]


def test_a_channel_that_requires_a_reference_refuses_samples_without_one(client: TestClient, keys: Keys,
                                                                        make_channel: Any) -> None:
    make_channel(CH, require_reference=True)
    make(client, keys["technician"], "ref.a")
    dev = keys["device"]
    err = expect_error(client, "POST", SAMPLES, 422, "reference_required", headers=dev,
                       json={"samples": [{"x": 1.0, "y": 2.0, "reference": "ref.a"}, {"x": 2.0, "y": 4.0}]})
    assert err["details"] == {"index": 1, "field": "reference"}
    err = expect_error(client, "POST", "/v1/samples", 422, "reference_required", headers=dev,
                       json={"samples": [{"channel": CH, "x": 1.0, "y": 2.0}]})
    assert err["details"]["channel"] == CH
    ok(client.post(SAMPLES, headers=dev, json={"reference": "ref.a", "samples": [{"x": 1.0, "y": 2.0}]}))
    # the setting can be switched off again (it is one of the settings a channel may change)
    out = ok(client.patch(f"/v1/channels/{CH}", json={"require_reference": False}, headers=keys["technician"]))
    assert out["require_reference"] is False
    ok(client.post(SAMPLES, headers=dev, json={"samples": [{"x": 2.0, "y": 4.0}]}))
    expect_error(client, "PATCH", f"/v1/channels/{CH}", 422, "validation_error", headers=keys["technician"],
                 json={"require_reference": "yes"})


# calibrate -------------------------------------------------------------------------------------------
def test_calibrate_refuses_an_unknown_retired_overdue_or_mismatched_reference(client: TestClient, keys: Keys,
                                                                             make_channel: Any) -> None:
    make_channel(CH)
    h = keys["technician"]
    ok(client.post(REFS, json=overdue_body("ref.late"), headers=h), 201)
    make(client, h, "ref.old")
    ok(client.patch(f"{REFS}/ref.old", json={"retired": True}, headers=h))
    make(client, h, "ref.celsius", unit="degC")
    for extra in ({}, {"dry_run": True}):
        expect_error(client, "POST", CALIBRATE, 404, "reference_not_found", headers=h,
                     json={"points": POINTS, "reference": "no.such", **extra})
        expect_error(client, "POST", CALIBRATE, 409, "reference_retired", headers=h,
                     json={"points": POINTS, "reference": "ref.old", "allow_overdue_reference": True, **extra})
        err = expect_error(client, "POST", CALIBRATE, 409, "reference_overdue", headers=h,
                           json={"points": POINTS, "reference": "ref.late", **extra})
        assert err["details"]["due_on"] == (today() - timedelta(days=5)).isoformat()
        expect_error(client, "POST", CALIBRATE, 422, "invalid_request", headers=h,
                     json={"points": POINTS, "reference": "ref.celsius", **extra})
    expect_error(client, "POST", CALIBRATE, 422, "validation_error", headers=h,
                 json={"points": POINTS, "reference": "ref.late", "allow_overdue_reference": "yes"})


def test_an_overdue_reference_when_allowed_is_recorded(client: TestClient, keys: Keys, make_channel: Any,
                                                       admin: dict[str, str]) -> None:
    make_channel(CH)
    h = keys["technician"]
    ok(client.post(REFS, json=overdue_body("ref.late"), headers=h), 201)
    out = ok(client.post(CALIBRATE, headers=h, json={"points": POINTS, "reference": "ref.late",
                                                     "allow_overdue_reference": True}))
    ref = out["reference"]
    assert (ref["id"], ref["overdue"], ref["allow_overdue_reference"]) == ("ref.late", True, True)
    assert ref["on"] == today().isoformat() and ref["certificate"] == "CERT-0001"
    event = ok(client.get(f"/v1/channels/{CH}/events", headers=h, params={"kind": "calibration"}))["items"][-1]
    assert event["details"]["reference"]["overdue"] is True
    assert event["details"]["reference"]["allow_overdue_reference"] is True
    trail = ok(client.get("/v1/audit", headers=admin, params={"kind": "calibration"}))["items"]
    assert trail[-1]["details"]["reference"]["id"] == "ref.late"
    # a reference in date: recorded as not overdue
    make(client, h, "ref.ok")
    out = ok(client.post(CALIBRATE, headers=h, json={"points": POINTS, "reference": "ref.ok"}))
    assert (out["reference"]["overdue"], out["reference"]["allow_overdue_reference"]) == (False, False)
    assert ok(client.post(CALIBRATE, headers=h, json={"points": POINTS}))["reference"] is None


def predict_u(client: TestClient, h: dict[str, str], x: list[float]) -> list[float]:
    out = ok(client.post(f"/v1/channels/{CH}/predict", json={"x": x}, headers=h))
    return out["u"]  # type: ignore[no-any-return]


def test_the_reference_instrument_enters_the_channel_uncertainty(client: TestClient, keys: Keys,
                                                                 make_channel: Any) -> None:
    """GUM 5.1.2 (eq. 10), uncorrelated inputs with unit sensitivity: u_c^2 = u_other^2 +
    u_ref^2. The same points fitted again give the same curve and scatter (u_other); naming a
    reference with U = 0.4, k = 2 adds u_ref = 0.2 by hand, a rectangular half-width of 0.3 adds
    0.3 / sqrt 3 (GUM 4.3.7)."""
    make_channel(CH)
    h = keys["technician"]
    x = [0.0, 33.0, 90.0]
    ok(client.post(CALIBRATE, headers=h, json={"points": POINTS}))
    before = predict_u(client, h, x)
    make(client, h, "ref.n", expanded_uncertainty=0.4, coverage_factor=2.0)
    ok(client.post(CALIBRATE, headers=h, json={"points": POINTS, "reference": "ref.n"}))
    after = predict_u(client, h, x)
    for b, a in zip(before, after, strict=True):
        assert math.isclose(a, math.sqrt(b * b + 0.2 * 0.2), rel_tol=1e-12)
    setting = ok(client.get(f"/v1/channels/{CH}", headers=h))["reference"]
    assert setting == {"expanded_uncertainty": 0.4, "coverage_factor": 2.0, "distribution": "normal",
                       "instrument": "ref.n"}
    make(client, h, "ref.r", expanded_uncertainty=None, coverage_factor=None, distribution="rectangular",
         half_width=0.3)
    ok(client.post(CALIBRATE, headers=h, json={"points": POINTS, "reference": "ref.r"}))
    rect = predict_u(client, h, x)
    for b, a in zip(before, rect, strict=True):
        assert math.isclose(a, math.sqrt(b * b + 0.3 * 0.3 / 3.0), rel_tol=1e-12)
    assert ok(client.get(f"/v1/channels/{CH}", headers=h))["reference"]["instrument"] == "ref.r"
    # a dry run names the reference and changes nothing
    expect_nothing = ok(client.post(CALIBRATE, headers=h, json={"points": POINTS, "reference": "ref.n",
                                                                "dry_run": True}))
    assert expect_nothing["applied"] is False and expect_nothing["reference"]["id"] == "ref.n"
    assert ok(client.get(f"/v1/channels/{CH}", headers=h))["reference"]["instrument"] == "ref.r"
    # the log gives the same channel: replay reproduces the state and the configuration
    with client.app.state.ctx.store.transaction(write=False) as repo:  # type: ignore[attr-defined]
        report = replay(repo, CH, check=True)
    assert report.matches, report.mismatches
