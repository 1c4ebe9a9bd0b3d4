"""Reference instrument routes: ``POST /v1/references``, ``GET /v1/references``,
``GET /v1/references/{rid}``, ``PATCH /v1/references/{rid}``.

Grouped per route; unauthorised cases first, then bad input, then success. Every failed
request must leave the store as it was (``expect_error``).
"""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, timedelta
from typing import Any

from fastapi.testclient import TestClient

from tests.api.helpers import CODES_422, Cases, Keys, expect_error, ok

REFS = "/v1/references"


def today() -> date:
    return datetime.now(UTC).date()


def body(rid: str = "bath.ref1", **over: Any) -> dict[str, Any]:
    """A valid create body: calibrated 100 days ago, due in a year."""
    out: dict[str, Any] = {"id": rid, "description": "platinum thermometer in the check bath", "unit": "kPa",
                           "expanded_uncertainty": 0.04, "coverage_factor": 2.0, "certificate": "CERT-0001",
                           "calibrated_on": (today() - timedelta(days=100)).isoformat(),
                           "due_on": (today() + timedelta(days=265)).isoformat(),
                           "note": "traceable to the invented national standard of the test suite"}
    out.update(over)
    return {k: v for k, v in out.items() if v is not None}


def make(client: TestClient, headers: dict[str, str], rid: str = "bath.ref1", **over: Any) -> dict[str, Any]:
    return ok(client.post(REFS, json=body(rid, **over), headers=headers), 201)  # type: ignore[no-any-return]


# POST /v1/references ------------------------------------------------------------------------
def test_create_without_a_key_is_401_and_with_a_device_key_403(client: TestClient, keys: Keys) -> None:
    expect_error(client, "POST", REFS, 401, "unauthorized", json=body())
    expect_error(client, "POST", REFS, 401, "unauthorized", json=body(), headers=keys["revoked"])
    expect_error(client, "POST", REFS, 403, "forbidden", json=body(), headers=keys["device"])


def test_create_refuses_bad_input_and_stores_nothing(client: TestClient, keys: Keys) -> None:
    h = keys["technician"]
    make(client, h, "bath.taken")
    cal = (today() - timedelta(days=10)).isoformat()
    cases = Cases()
    bad = {
        "U zero": (422, CODES_422, body(expanded_uncertainty=0)),
        "U negative": (422, CODES_422, body(expanded_uncertainty=-0.1)),
        "U not a number": (422, CODES_422, body(expanded_uncertainty="0.1")),
        "k zero": (422, CODES_422, body(coverage_factor=0)),
        "k negative": (422, CODES_422, body(coverage_factor=-2)),
        "u zero": (422, CODES_422, body(expanded_uncertainty=None, coverage_factor=None, standard_uncertainty=0)),
        "half-width zero": (422, CODES_422, body(expanded_uncertainty=None, coverage_factor=None,
                                                 distribution="rectangular", half_width=0)),
        "due before calibrated": (422, "invalid_request",
                                  body(calibrated_on=cal, due_on=(today() - timedelta(days=11)).isoformat())),
        "duplicate id": (409, "reference_exists", body("bath.taken")),
        "unknown field": (422, "validation_error", body(colour="blue")),
        "retired on create": (422, "validation_error", body(retired=True)),
        "no uncertainty": (422, "invalid_request", body(expanded_uncertainty=None, coverage_factor=None)),
        "u and U": (422, "invalid_request", body(standard_uncertainty=0.02)),
        "half-width of a normal": (422, "invalid_request", body(half_width=0.1)),
        "rectangular with U": (422, "invalid_request", body(distribution="rectangular", coverage_factor=None)),
        "rectangular without a": (422, "invalid_request", body(expanded_uncertainty=None, coverage_factor=None,
                                                              distribution="rectangular")),
        "unknown distribution": (422, "validation_error", body(distribution="uniform")),
        "date-time for a day": (422, "validation_error", body(due_on="2030-01-01T00:00:00Z")),
        "number for a day": (422, "validation_error", body(due_on=1900000000)),
        "no unit": (422, "validation_error", body(unit=" ")),
        "no certificate": (422, "validation_error", body(certificate="")),
        "id with a slash": (422, "validation_error", body("bath/ref")),
        "id in capitals": (422, "validation_error", body("Bath.Ref")),
        "note with a control character": (422, "validation_error", body(note="a\x00b")),
    }
    for name, (status, code, payload) in bad.items():
        with cases.case(name):
            expect_error(client, "POST", REFS, status, code, json=payload, headers=h)
    cases.done()


def test_the_three_forms_give_u_by_the_gum(client: TestClient, keys: Keys) -> None:
    """JCGM 100:2008 (GUM): 4.3.3, a certificate's U with k gives u = U / k; 4.3.7, a
    rectangular distribution of half-width a gives u = a / sqrt 3; 4.3.9, a triangular one
    u = a / sqrt 6. Worked by hand: 0.04 / 2 = 0.02; 0.3 / sqrt 3 = sqrt 3 / 10 =
    0.17320508075688772...; 0.6 / sqrt 6 = sqrt 6 / 10 = 0.24494897427831781...; and a
    stated u of 0.015 is u itself (k = 1)."""
    h = keys["technician"]
    normal = make(client, h, "ref.normal")
    rect = make(client, h, "ref.rect", expanded_uncertainty=None, coverage_factor=None, distribution="rectangular",
                half_width=0.3)
    tri = make(client, h, "ref.tri", expanded_uncertainty=None, coverage_factor=None, distribution="triangular",
               half_width=0.6)
    plain = make(client, h, "ref.u", expanded_uncertainty=None, coverage_factor=None, standard_uncertainty=0.015)
    default_k = make(client, h, "ref.k2", coverage_factor=None, expanded_uncertainty=0.05)
    assert math.isclose(normal["standard_uncertainty"], 0.02, rel_tol=1e-15)
    assert (normal["distribution"], normal["half_width"]) == ("normal", None)
    assert math.isclose(rect["standard_uncertainty"], 0.17320508075688772, rel_tol=1e-14)
    assert rect["half_width"] == 0.3 and rect["expanded_uncertainty"] == 0.3
    assert math.isclose(rect["coverage_factor"] ** 2, 3.0, rel_tol=1e-15)
    assert math.isclose(tri["standard_uncertainty"], 0.24494897427831781, rel_tol=1e-14)
    assert math.isclose(tri["coverage_factor"] ** 2, 6.0, rel_tol=1e-15)
    assert (plain["standard_uncertainty"], plain["expanded_uncertainty"], plain["coverage_factor"]) == (
        0.015, 0.015, 1.0)
    # common practice: a certificate's k is 2 (about 95 %) when the body states none
    assert default_k["coverage_factor"] == 2.0 and math.isclose(default_k["standard_uncertainty"], 0.025)
    assert normal["due_state"] == "ok" and normal["retired"] is False
    assert ok(client.get(f"{REFS}/ref.tri", headers=h)) == tri


# GET /v1/references and /v1/references/{rid} --------------------------------------------------
def test_read_needs_a_valid_key_and_any_role_may_read(client: TestClient, keys: Keys) -> None:
    make(client, keys["technician"])
    expect_error(client, "GET", REFS, 401, "unauthorized")
    expect_error(client, "GET", f"{REFS}/bath.ref1", 401, "unauthorized", headers=keys["revoked"])
    assert ok(client.get(f"{REFS}/bath.ref1", headers=keys["device"]))["id"] == "bath.ref1"
    assert [r["id"] for r in ok(client.get(REFS, headers=keys["device"]))["items"]] == ["bath.ref1"]


def test_get_of_an_unknown_reference_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(client, "GET", f"{REFS}/no.such", 404, "reference_not_found", headers=keys["technician"])
    expect_error(client, "GET", f"{REFS}/..", 404, {"not_found", "validation_error"}, headers=keys["technician"])


def test_list_refuses_bad_filters_and_cursors(client: TestClient, keys: Keys) -> None:
    h = keys["technician"]
    expect_error(client, "GET", REFS, 422, "invalid_request", headers=h, params={"due_state": "late"})
    expect_error(client, "GET", REFS, 422, "invalid_request", headers=h, params={"cursor": "xyz"})
    expect_error(client, "GET", REFS, 422, "validation_error", headers=h, params={"retired": "maybe"})
    expect_error(client, "GET", REFS, 422, "validation_error", headers=h, params={"limit": 0})


def test_due_state_against_today_and_the_window(client: TestClient, keys: Keys) -> None:
    """Overdue once the due day has passed; due_soon from the due day back to 30 days before
    it (the default window), both ends included; ok before. The filter gives the same."""
    h = keys["technician"]
    cal = (today() - timedelta(days=400)).isoformat()
    for rid, days in (("r.past", -1), ("r.today", 0), ("r.edge", 30), ("r.after", 31), ("r.far", 300)):
        make(client, h, rid, calibrated_on=cal, due_on=(today() + timedelta(days=days)).isoformat())
    states = {r["id"]: r["due_state"] for r in ok(client.get(REFS, headers=h))["items"]}
    assert states == {"r.past": "overdue", "r.today": "due_soon", "r.edge": "due_soon", "r.after": "ok",
                      "r.far": "ok"}
    for state in ("ok", "due_soon", "overdue"):
        got = [r["id"] for r in ok(client.get(REFS, headers=h, params={"due_state": state}))["items"]]
        assert got == [rid for rid, s in states.items() if s == state], state


def test_list_pages_and_filters_retired(client: TestClient, keys: Keys) -> None:
    h = keys["technician"]
    for i in range(5):
        make(client, h, f"r.{i}")
    ok(client.patch(f"{REFS}/r.2", json={"retired": True}, headers=h))
    seen, cursor = [], None
    while True:
        page = ok(client.get(REFS, headers=h, params={"limit": 2, **({"cursor": cursor} if cursor else {})}))
        seen += [r["id"] for r in page["items"]]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    assert seen == [f"r.{i}" for i in range(5)]
    assert [r["id"] for r in ok(client.get(REFS, headers=h, params={"retired": "true"}))["items"]] == ["r.2"]
    assert "r.2" not in [r["id"] for r in ok(client.get(REFS, headers=h, params={"retired": "false"}))["items"]]


# PATCH /v1/references/{rid} ------------------------------------------------------------------------
def test_patch_needs_a_technician_key(client: TestClient, keys: Keys) -> None:
    make(client, keys["technician"])
    expect_error(client, "PATCH", f"{REFS}/bath.ref1", 401, "unauthorized", json={"note": "x"})
    expect_error(client, "PATCH", f"{REFS}/bath.ref1", 403, "forbidden", json={"note": "x"}, headers=keys["device"])


def test_patch_refuses_bad_input_and_changes_nothing(client: TestClient, keys: Keys) -> None:
    h = keys["technician"]
    make(client, h)
    url = f"{REFS}/bath.ref1"
    cases = Cases()
    bad = {
        "unknown reference": ("PATCH", f"{REFS}/no.such", 404, "reference_not_found", {"note": "x"}),
        "id": ("PATCH", url, 409, "immutable_field", {"id": "bath.ref2"}),
        "unit": ("PATCH", url, 409, "immutable_field", {"unit": "degC"}),
        "U zero": ("PATCH", url, 422, "validation_error", {"expanded_uncertainty": 0}),
        "k negative": ("PATCH", url, 422, "validation_error", {"coverage_factor": -1}),
        "due before calibrated": ("PATCH", url, 422, "invalid_request",
                                  {"due_on": (today() - timedelta(days=101)).isoformat()}),
        "calibrated after due": ("PATCH", url, 422, "invalid_request",
                                 {"calibrated_on": (today() + timedelta(days=266)).isoformat()}),
        "un-retire": ("PATCH", url, 422, "validation_error", {"retired": False}),
        "unknown field": ("PATCH", url, 422, "validation_error", {"colour": "blue"}),
        "rectangular without a": ("PATCH", url, 422, "invalid_request", {"distribution": "rectangular"}),
        "null note": ("PATCH", url, 422, "validation_error", {"note": None}),
    }
    for name, (method, target, status, code, payload) in bad.items():
        with cases.case(name):
            expect_error(client, method, target, status, code, json=payload, headers=h)
    cases.done()


def test_patch_restates_the_uncertainty_and_dates_and_is_audited(client: TestClient, keys: Keys,
                                                                  admin: dict[str, str]) -> None:
    h = keys["technician"]
    make(client, h)
    url = f"{REFS}/bath.ref1"
    out = ok(client.patch(url, json={"coverage_factor": 2.5}, headers=h))
    assert (out["expanded_uncertainty"], out["coverage_factor"]) == (0.04, 2.5)  # U stays, k changes
    assert math.isclose(out["standard_uncertainty"], 0.016)
    out = ok(client.patch(url, json={"distribution": "triangular", "half_width": 0.6}, headers=h))
    assert math.isclose(out["standard_uncertainty"], 0.24494897427831781, rel_tol=1e-14)  # GUM 4.3.9, as above
    out = ok(client.patch(url, json={"standard_uncertainty": 0.01, "distribution": "normal"}, headers=h))
    assert (out["standard_uncertainty"], out["coverage_factor"], out["half_width"]) == (0.01, 1.0, None)
    new_due = (today() + timedelta(days=3)).isoformat()
    out = ok(client.patch(url, json={"certificate": "CERT-0002", "due_on": new_due}, headers=h))
    assert (out["certificate"], out["due_on"], out["due_state"]) == ("CERT-0002", new_due, "due_soon")
    out = ok(client.patch(url, json={"retired": True, "note": "replaced"}, headers=h))
    assert out["retired"] is True and out["note"] == "replaced"
    expect_error(client, "PATCH", url, 409, "reference_retired", json={"note": "again"}, headers=h)
    trail = ok(client.get("/v1/audit", headers=admin, params={"limit": 100}))["items"]
    mine = [(e["kind"], e["summary"]) for e in trail if e["kind"].startswith("reference_")]
    assert mine[0] == ("reference_created", "created reference instrument bath.ref1")
    assert mine[1] == ("reference_changed", "changed reference instrument bath.ref1: coverage_factor")
    assert mine[-1] == ("reference_retired", "retired reference instrument bath.ref1")
    assert len(mine) == 6
