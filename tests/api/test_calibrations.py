"""Calibration records, decision rules and due dates through the API
(``api/routes/calibrations.py``, the record part of ``POST .../calibrate``, the
``due_on`` / ``due_state`` of a channel and the list's ``due_state`` filter).

Unauthorised and bad-input cases first; each failing request checks its status, its
error code and that the store did not change. Numbers are checked against numpy
(``numpy.polyfit`` for the curve and its residuals), the GUM's root sum of squares
(GUM 5.1.2, eq. 10) worked here, and the decision rules of ILAC-G8:2019 clause 4.2
(simple acceptance; guard band w = U) applied by hand to the answer's own U.
"""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from tests.api.helpers import CODES_422, Headers, expect_error, ok
from tests.conftest import store_fingerprint

Keys = dict[str, Headers]

CH = "site-a.p1"
CAL = f"/v1/channels/{CH}/calibrate"
RECORDS = f"/v1/channels/{CH}/calibrations"
TOL = 0.5  # kPa
# a line 3 + 0.5 x (kPa over mV) read with fixed bench noise
XS = [0.0, 12.5, 25.0, 40.0, 55.0, 70.0, 85.0, 100.0]
NOISE = [0.02, -0.05, 0.03, 0.04, -0.01, -0.06, 0.05, -0.02]


def bench(offset: float = 0.0) -> list[dict[str, float]]:
    """Points of the line shifted by ``offset`` kPa: the sensor reads ``offset`` less than before."""
    return [{"x": x, "y": 3.0 + offset + 0.5 * x + e} for x, e in zip(XS, NOISE, strict=True)]


def calibrate(client: TestClient, headers: Headers, url: str = CAL, **body: Any) -> dict[str, Any]:
    return ok(client.post(url, json={"points": bench(), **body}, headers=headers))  # type: ignore[no-any-return]


@pytest.fixture
def channel(make_channel: Any) -> dict[str, Any]:
    return make_channel(CH, drift={"tolerance": TOL})  # type: ignore[no-any-return]


# bad input -------------------------------------------------------------------------


def test_records_need_a_technician_key_and_a_known_channel_and_record(client: TestClient, keys: Keys,
                                                                      channel: Any) -> None:
    expect_error(client, "GET", RECORDS, 401, "unauthorized")
    expect_error(client, "GET", RECORDS, 403, "forbidden", headers=keys["device"])
    expect_error(client, "GET", "/v1/channels/site-a.none/calibrations", 404, "channel_not_found",
                 headers=keys["technician"])
    expect_error(client, "GET", f"{RECORDS}/1", 404, "calibration_not_found", headers=keys["technician"])
    expect_error(client, "GET", f"{RECORDS}/0", 422, CODES_422, headers=keys["technician"])
    expect_error(client, "GET", f"{RECORDS}/{2**31}", 422, CODES_422, headers=keys["technician"])
    expect_error(client, "GET", RECORDS, 422, "invalid_request", headers=keys["technician"],
                 params={"cursor": "nonsense"})


def test_calibrate_refuses_a_future_time_and_a_bad_supersedes_or_conditions(client: TestClient, keys: Keys,
                                                                           make_channel: Any, channel: Any) -> None:
    tech = keys["technician"]
    future = (datetime.now(UTC) + timedelta(hours=1)).isoformat()
    err = expect_error(client, "POST", CAL, 422, "invalid_request", headers=tech,
                       json={"points": bench(), "at": future})
    assert err["details"]["field"] == "at"
    for at in ("2026-01-01T10:00:00", 1767261600, "yesterday"):  # no zone, a number, not a time
        expect_error(client, "POST", CAL, 422, "validation_error", headers=tech, json={"points": bench(), "at": at})
    expect_error(client, "POST", CAL, 404, "calibration_not_found", headers=tech,
                 json={"points": bench(), "supersedes": 1})
    for bad in ({"values": {"t": [1]}}, {"values": {"": 1}}, {"values": {f"k{i}": i for i in range(51)}},
                {"note": "line\nbreak"}, {"other": 1}, {"values": {"t": 1e16}}):
        expect_error(client, "POST", CAL, 422, "validation_error", headers=tech,
                     json={"points": bench(), "conditions": bad})
    # a record of another channel is not this channel's to supersede
    other = "/v1/channels/site-a.p2/calibrate"
    make_channel("site-a.p2")
    first = calibrate(client, tech, url=other)["calibration"]
    expect_error(client, "POST", CAL, 404, "calibration_not_found", headers=tech,
                 json={"points": bench(), "supersedes": first})
    # a record is superseded once
    mine = calibrate(client, tech)["calibration"]
    correction = calibrate(client, tech, supersedes=mine)["calibration"]
    err = expect_error(client, "POST", CAL, 409, "already_superseded", headers=tech,
                       json={"points": bench(), "supersedes": mine})
    assert err["details"]["superseded_by"] == correction


def test_settings_refuse_a_bad_rule_or_interval(client: TestClient, keys: Keys, channel: Any) -> None:
    url = f"/v1/channels/{CH}"
    for body in ({"decision_rule": "shared_risk"}, {"decision_rule": None}, {"recalibration_interval_days": 0},
                 {"recalibration_interval_days": 3651}, {"recalibration_interval_days": 1.5},
                 {"recalibration_interval_days": "365"}, {"due_soon_days": -1}, {"due_soon_days": True}):
        expect_error(client, "PATCH", url, 422, "validation_error", headers=keys["technician"], json=body)
    expect_error(client, "POST", "/v1/channels", 422, "validation_error", headers=keys["technician"],
                 json={"id": "site-a.p9", "inputs": [{"unit": "mV", "min": 0, "max": 1}], "output": {"unit": "kPa"},
                       "decision_rule": "strict"})
    expect_error(client, "GET", "/v1/channels", 422, "invalid_request", headers=keys["technician"],
                 params={"due_state": "late"})


def test_records_cannot_be_changed_or_deleted(client: TestClient, keys: Keys, channel: Any) -> None:
    rid = calibrate(client, keys["technician"])["calibration"]
    for method in ("PUT", "PATCH", "DELETE"):
        expect_error(client, method, f"{RECORDS}/{rid}", 405, "method_not_allowed", headers=keys["admin"],
                     json={"verdict": "pass"})
    expect_error(client, "POST", f"{RECORDS}/{rid}", 405, "method_not_allowed", headers=keys["admin"], json={})


# the record ------------------------------------------------------------------------


def test_a_first_calibration_has_no_as_found_and_its_as_left_is_the_fit(client: TestClient, keys: Keys,
                                                                        channel: Any) -> None:
    ok(client.post("/v1/references", json={"id": "ref-bath-2", "unit": "kPa", "expanded_uncertainty": 0.02,
                                           "certificate": "BATH-2-CERT", "calibrated_on": "2026-01-05",
                                           "due_on": "2036-01-05"}, headers=keys["technician"]), 201)
    out = calibrate(client, keys["technician"], conditions={"values": {"ambient_temperature": "21.4 degC",
                                                                       "humidity_percent": 45}, "note": "bath 2"},
                    reference="ref-bath-2")
    rec = ok(client.get(f"{RECORDS}/{out['calibration']}", headers=keys["technician"]))
    assert {k: rec[k] for k in out["record"]} == out["record"]  # the stored record is the answered one
    assert rec["channel"] == CH and rec["version"] == out["version"] and rec["supersedes"] is None
    assert rec["conditions"] == {"values": {"ambient_temperature": "21.4 degC", "humidity_percent": 45},
                                 "note": "bath 2"}
    assert [(r["id"], r["certificate"], r["due_on"]) for r in rec["references"]] == [
        ("ref-bath-2", "BATH-2-CERT", "2036-01-05")] and rec["decision_rule"] == "simple"
    # never calibrated: no as-found indication, nothing to judge, the interval stays
    assert all(p["indicated"] is None and p["error"] is None and p["verdict"] == "not_applicable"
               for p in rec["as_found"])
    assert rec["as_found_verdict"] == "not_applicable"
    assert rec["interval_suggestion"]["days"] == 365 and rec["interval_suggestion"]["basis"] == "no_as_found"
    # as left: the least-squares line (numpy.polyfit) at each reading
    ys = np.array([p["y"] for p in bench()])
    c1, c0 = np.polyfit(XS, ys, 1)
    fitted = c0 + c1 * np.array(XS)
    left = rec["as_left"]
    np.testing.assert_allclose([p["indicated"] for p in left], fitted, rtol=0, atol=1e-9)
    np.testing.assert_allclose([p["error"] for p in left], fitted - ys, rtol=0, atol=1e-9)
    assert [p["reference_value"] for p in left] == ys.tolist() and [p["x"] for p in left] == XS
    assert all(p["tolerance"] == TOL and p["verdict"] == "pass" for p in left) and rec["verdict"] == "pass"
    fit = rec["fit"]
    np.testing.assert_allclose(fit["coefficients"], [c0, c1], rtol=1e-9)
    assert fit["n"] == 8 and fit["dof"] == 6 and fit["coefficients_of"] == "raw_terms"
    # residual s.d. in output units: sqrt(sum r^2 / (n - 2))
    assert fit["residual_sd"] == pytest.approx(math.sqrt(float(np.sum((ys - fitted) ** 2)) / 6), rel=1e-9)
    # the budget: where U is largest, its rows combine by root sum of squares (GUM eq. 10),
    # and it is the budget predict gives at that reading
    b = rec["budget"]
    assert max(p["U"] for p in left) == b["U"]
    assert math.sqrt(sum(r["contribution"] ** 2 for r in b["rows"])) == pytest.approx(b["u_combined"], rel=1e-12)
    assert b["U"] == pytest.approx(b["k"] * b["u_combined"], rel=1e-12)
    assert [(r["source"], r["type"]) for r in b["rows"]] == [("curve and scatter", "A"), ("reference", "B")]
    # the reference instrument named: U 0.02 kPa with the default k = 2 gives u = 0.01 kPa (GUM 4.3.3)
    assert rec["references"][0]["standard_uncertainty"] == pytest.approx(0.01, rel=1e-12)
    assert b["rows"][1]["u"] == pytest.approx(0.01, rel=1e-12)
    pred = ok(client.post(f"/v1/channels/{CH}/predict", json={"x": [b["x"]]}, headers=keys["technician"]))
    assert (pred["u"][0], pred["U"][0], pred["k"][0], pred["dof"][0]) == pytest.approx(
        (b["u_combined"], b["U"], b["k"], b["dof_effective"]), rel=1e-12)


def test_as_found_is_the_curve_before_and_the_rule_judges_it(client: TestClient, keys: Keys, channel: Any) -> None:
    tech = keys["technician"]
    calibrate(client, tech)
    before = ok(client.post(f"/v1/channels/{CH}/predict", json={"x": XS}, headers=tech))["y"]
    # the sensor now reads 0.42 kPa less at the same reading: as found, the curve is 0.42 high
    # (give or take the first fit's residuals, at most 0.06)
    store_before = store_fingerprint(client)
    dry = calibrate(client, tech, points=bench(-0.42), dry_run=True)
    assert store_fingerprint(client) == store_before and dry["calibration"] is None  # a dry run stores nothing
    found = dry["record"]["as_found"]
    np.testing.assert_allclose([p["indicated"] for p in found], before, rtol=0, atol=1e-12)
    errors = [p["error"] for p in found]
    np.testing.assert_allclose(errors, np.array(before) - [p["y"] for p in bench(-0.42)], atol=1e-12)
    # simple acceptance (ILAC-G8 4.2.1): |e| <= 0.5 passes
    assert all(abs(e) <= TOL for e in errors) and dry["record"]["as_found_verdict"] == "pass"
    # 365 d x 1.25 = 456.25 -> 456 d, in tolerance as found
    assert dry["record"]["interval_suggestion"]["days"] == 456
    ok(client.patch(f"/v1/channels/{CH}", json={"decision_rule": "guarded"}, headers=tech))
    rec = calibrate(client, tech, points=bench(-0.42))["record"]
    assert rec["decision_rule"] == "guarded"
    # guard band w = U (ILAC-G8 4.2.2): pass up to T - U, conditional up to T + U; with U of
    # about 0.1 and |e| from 0.36 to 0.48, some points pass and some are conditional
    verdicts = []
    for p in rec["as_found"]:
        assert 0.05 < p["U"] < 0.3, p
        e, U = abs(p["error"]), p["U"]
        verdicts.append("pass" if e <= TOL - U else "conditional" if e <= TOL + U else "fail")
    assert [p["verdict"] for p in rec["as_found"]] == verdicts
    assert "pass" in verdicts and "conditional" in verdicts and rec["as_found_verdict"] == "conditional"
    assert rec["verdict"] == "pass"  # as left: |e| < 0.06, far inside 0.5 - U
    # out of tolerance as found: the curve is now 0.9 high; |e| > T + U fails, the interval halves
    out = calibrate(client, tech, points=bench(-0.42 - 0.9))["record"]
    assert all(p["verdict"] == "fail" for p in out["as_found"]) and out["as_found_verdict"] == "fail"
    assert out["interval_suggestion"]["days"] == 182 and out["interval_suggestion"]["basis"] == "out_of_tolerance"
    # never applied silently: the channel keeps its interval until a PATCH
    assert ok(client.get(f"/v1/channels/{CH}", headers=tech))["recalibration_interval_days"] == 365


def test_corrections_supersede_once_and_records_page(client: TestClient, keys: Keys, admin: Headers,
                                                     channel: Any) -> None:
    made = ok(client.post("/v1/keys", json={"role": "technician", "label": "bench tech 4"}, headers=admin), 201)
    tech = {"Authorization": f"Bearer {made['secret']}"}
    first = calibrate(client, tech)["calibration"]
    second = calibrate(client, tech, supersedes=first, label="typo in a reference value")["calibration"]
    third = calibrate(client, tech)["calibration"]
    one = ok(client.get(f"{RECORDS}/{first}", headers=tech))
    two = ok(client.get(f"{RECORDS}/{second}", headers=tech))
    assert (one["superseded_by"], two["supersedes"], two["superseded_by"]) == (second, first, None)
    assert one["by"] == "bench tech 4" and one["key_id"] == made["id"]
    page = ok(client.get(RECORDS, params={"limit": 2}, headers=tech))
    assert [r["id"] for r in page["items"]] == [first, second] and page["next_cursor"]
    rest = ok(client.get(RECORDS, params={"limit": 2, "cursor": page["next_cursor"]}, headers=tech))
    assert [r["id"] for r in rest["items"]] == [third] and rest["next_cursor"] is None
    err = expect_error(client, "POST", CAL, 409, "already_superseded", headers=tech,
                       json={"points": bench(), "supersedes": first})
    assert err["details"]["superseded_by"] == second


# due dates -------------------------------------------------------------------------


def test_due_dates_count_from_the_records_time(client: TestClient, keys: Keys, make_channel: Any) -> None:
    tech = keys["technician"]
    now = datetime.now(UTC)
    ages = {"site-a.old": 400, "site-a.soon": 350, "site-a.fresh": 10}  # days since calibrated
    for cid, days in ages.items():
        make_channel(cid)
        at = now - timedelta(days=days)
        rec = calibrate(client, tech, url=f"/v1/channels/{cid}/calibrate", at=at.isoformat())
        assert datetime.fromisoformat(ok(client.get(f"/v1/channels/{cid}/calibrations/{rec['calibration']}",
                                                    headers=tech))["at"]) == at
    make_channel("site-a.never")
    today = now.date()

    def due(cid: str) -> tuple[date | None, str | None]:
        got = ok(client.get(f"/v1/channels/{cid}", headers=tech))
        return (date.fromisoformat(got["due_on"]) if got["due_on"] else None), got["due_state"]

    # due_on = the calibration's date + 365 d; due soon from 30 d before it
    assert due("site-a.old") == ((now - timedelta(days=400)).date() + timedelta(days=365), "overdue")
    soon, state = due("site-a.soon")
    assert soon == (now - timedelta(days=350)).date() + timedelta(days=365) and 0 <= (soon - today).days <= 30
    assert state == "due_soon"
    assert due("site-a.fresh")[1] == "ok" and due("site-a.never") == (None, None)

    def listed(state: str) -> list[str]:
        return [c["id"] for c in ok(client.get("/v1/channels", params={"due_state": state}, headers=tech))["items"]]

    assert listed("overdue") == ["site-a.old"] and listed("due_soon") == ["site-a.soon"]
    # a shorter interval (applied by PATCH) moves the due date: 10 d ago + 30 d is due soon
    snap = ok(client.post("/v1/channels/site-a.fresh/snapshots", json={}, headers=tech), 201)["id"]
    ok(client.patch("/v1/channels/site-a.fresh", json={"recalibration_interval_days": 30}, headers=tech))
    assert due("site-a.fresh") == ((now - timedelta(days=10)).date() + timedelta(days=30), "due_soon")
    assert listed("due_soon") == ["site-a.soon", "site-a.fresh"]
    # a rollback brings back the settings the snapshot was taken under, the interval with them
    ok(client.post("/v1/channels/site-a.fresh/rollback", json={"snapshot": snap}, headers=tech))
    assert due("site-a.fresh") == ((now - timedelta(days=10)).date() + timedelta(days=365), "ok")
    ok(client.patch("/v1/channels/site-a.fresh", json={"recalibration_interval_days": 30}, headers=tech))
    # a calibration now makes the overdue channel current again; a back-dated one does not move it back
    calibrate(client, tech, url="/v1/channels/site-a.old/calibrate")
    calibrate(client, tech, url="/v1/channels/site-a.old/calibrate", at=(now - timedelta(days=900)).isoformat())
    assert due("site-a.old") == (today + timedelta(days=365), "ok") and listed("overdue") == []


def test_replay_agrees_with_a_channel_calibrated_with_records(client: TestClient, keys: Keys, channel: Any) -> None:
    from curvekeeper.actions.replay import replay

    tech = keys["technician"]
    first = calibrate(client, tech)["calibration"]
    ok(client.post(f"/v1/channels/{CH}/samples", json={"samples": [{"x": 50.0, "y": 28.1}]}, headers=tech))
    calibrate(client, tech, points=bench(0.2), supersedes=first)
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        report = replay(repo, CH, check=True)
    assert report.matches, report.mismatches
    assert report.replayed_events == 2


def test_a_fit_without_degrees_of_freedom_has_no_budget_and_no_guard_band(client: TestClient, keys: Keys,
                                                                           make_channel: Any) -> None:
    """Two points on a line leave no residual degrees of freedom: U is unknown, so the
    record has no budget rows and the guarded rule cannot state conformity (conditional)."""
    make_channel(CH, drift={"tolerance": TOL}, decision_rule="guarded")
    rec = calibrate(client, keys["technician"], points=[{"x": 0.0, "y": 3.0}, {"x": 100.0, "y": 53.0}])["record"]
    assert rec["fit"]["dof"] == 0 and rec["fit"]["residual_sd"] is None
    assert rec["budget"]["rows"] == [] and rec["budget"]["U"] is None
    assert [p["U"] for p in rec["as_left"]] == [None, None]
    assert [p["verdict"] for p in rec["as_left"]] == ["conditional"] * 2 and rec["verdict"] == "conditional"


# the report ------------------------------------------------------------------------


def test_the_report_is_a_pdf_of_the_record(client: TestClient, keys: Keys, channel: Any) -> None:
    """The PDF holds the record's numbers (read back with pypdf); an unknown record or
    channel is 404 and a device key may not read it, with nothing changed."""
    import io
    import re

    from pypdf import PdfReader

    tech = keys["technician"]
    out = calibrate(client, tech, conditions={"values": {"ambient_temperature": "21.0 degC"}, "note": "bench"})
    rid = out["calibration"]
    r = client.get(f"{RECORDS}/{rid}/report.pdf", headers=tech)
    assert r.status_code == 200 and r.headers["content-type"] == "application/pdf"
    assert f'filename="calibration-{CH}-{rid}.pdf"' in r.headers["content-disposition"]
    reader = PdfReader(io.BytesIO(r.content))
    text = re.sub(r"\s+", " ", " ".join(p.extract_text() for p in reader.pages))
    n = len(reader.pages)
    assert all(f"page {i} of {n}" in text.lower() for i in range(1, n + 1))
    assert CH in text and "21.0 degC" in text and f"{out['record']['budget']['U']:.6g}" in text
    expect_error(client, "GET", f"{RECORDS}/999/report.pdf", 404, "calibration_not_found", headers=tech)
    expect_error(client, "GET", f"/v1/channels/site-a.none/calibrations/{rid}/report.pdf", 404, "channel_not_found",
                 headers=tech)
    expect_error(client, "GET", f"{RECORDS}/{rid}/report.pdf", 403, "forbidden", headers=keys["device"])


def test_a_large_fit_keeps_the_points_with_the_largest_errors_in_its_tables(client: TestClient, keys: Keys,
                                                                           channel: Any) -> None:
    """1,500 points: every one is judged, the tables hold the 1,000 with the largest as-left
    |error| (numpy's argsort picks the same), in their order."""
    rng = np.random.default_rng(7)
    x = np.linspace(0, 100, 1500)
    y = 1.0 + 0.2 * x + 0.01 * rng.standard_normal(x.size)
    out = calibrate(client, keys["technician"], points=[{"x": float(a), "y": float(b)} for a, b in zip(x, y,
                                                                                                   strict=True)])
    rec = out["record"]
    assert rec["table"] == {"points": 1500, "shown": 1000, "selection": "largest_as_left_error"}
    line = np.polyfit(x, y, 1)
    err = np.polyval(line, x) - y
    keep = np.sort(np.argsort(-np.abs(err), kind="stable")[:1000])
    np.testing.assert_allclose([p["x"] for p in rec["as_left"]], x[keep], rtol=0, atol=0)
    np.testing.assert_allclose([p["error"] for p in rec["as_left"]], err[keep], rtol=0, atol=1e-9)
    assert [p["x"] for p in rec["as_found"]] == [p["x"] for p in rec["as_left"]]
    small = calibrate(client, keys["technician"])["record"]["table"]
    assert small["selection"] == "all" and small["points"] == small["shown"]
