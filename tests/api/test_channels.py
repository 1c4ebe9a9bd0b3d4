"""Channel routes: ``POST /v1/channels``, ``GET /v1/channels``, ``GET /v1/channels/{id}``,
``PATCH /v1/channels/{id}``.

Grouped per route; in each group the unauthorised cases come first, then bad input,
then success. Every failed request must leave the store exactly as it was
(``store_fingerprint``). Set-up goes through the public HTTP API.
"""

from __future__ import annotations

import copy
import math
from datetime import datetime
from typing import Any

import httpx
import numpy as np
import pytest
from curvekeeper.actions.unit import summary_columns
from curvekeeper.channel_config import EXAMPLE, channel_config
from curvekeeper.core import ChannelModel
from fastapi.testclient import TestClient
from scipy import stats

from tests.api.helpers import CODES_422, Cases, Headers, Keys, assert_error, expect_error, ok, stored_state
from tests.conftest import LINEAR, store_fingerprint

CHANNELS = "/v1/channels"



def send_text(client: TestClient, method: str, url: str, text: str, headers: Headers) -> httpx.Response:
    """A request whose body is the given text, sent as JSON (for NaN, Infinity, broken JSON)."""
    r: httpx.Response = client.request(method, url, content=text.encode(),
                                       headers={**headers, "Content-Type": "application/json"})
    return r




def in_control(n: int, seed: int) -> list[dict[str, Any]]:
    """n samples of y = 2 x + noise (s.d. 0.5), x uniform over the LINEAR range [0, 100]."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 100.0, n)
    y = 2.0 * x + rng.normal(0.0, 0.5, n)
    return [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]


def post_samples(client: TestClient, channel_id: str, samples: list[dict[str, Any]],
                 headers: Headers) -> dict[str, Any]:
    r = client.post(f"{CHANNELS}/{channel_id}/samples", json={"samples": samples}, headers=headers)
    assert r.status_code == 200, r.text
    out: dict[str, Any] = r.json()
    return out


def drive_into_alarm(client: TestClient, channel_id: str, headers: Headers) -> None:
    """200 in-control samples, then a sustained offset of +1000: the outlier gate stores the
    offset samples as rejected, and the detector (which sees every residual) alarms."""
    assert post_samples(client, channel_id, in_control(200, seed=11), headers)["drift"]["state"] == "ok"
    offset = [{"x": s["x"], "y": s["y"] + 1000.0} for s in in_control(20, seed=12)]
    assert post_samples(client, channel_id, offset, headers)["drift"]["state"] == "alarm"






def headers_for(keys: Keys, who: str | None) -> Headers:
    """Headers for a role in ``keys``; ``None``: no key; ``bad``: a key that does not exist."""
    if who is None:
        return {}
    if who == "bad":
        return {"Authorization": "Bearer ck_not-a-real-key"}
    return keys[who]


#: callers a technician route refuses: (who, status, code)
#: the codes of a 422: refused by the request schema, or by the rules below it (the core's
#: config rules, the cursor); which of the two does it is not part of the contract

NOT_TECHNICIANS = [(None, 401, "unauthorized"), ("bad", 401, "unauthorized"), ("revoked", 401, "unauthorized"),
                   ("device", 403, "forbidden"), ("other_device", 403, "forbidden")]


# --------------------------------------------------------------------------------------
# POST /v1/channels
# --------------------------------------------------------------------------------------

def test_create_refuses_callers_that_are_not_technicians(client: TestClient, keys: Keys) -> None:
    """No key, an unknown key, a malformed header, a revoked key: 401; a device key,
    even one whose prefix would cover the id: 403."""
    cases = Cases()
    callers: list[tuple[str, Headers, int, str]] = [
        (str(who), headers_for(keys, who), status, code) for who, status, code in NOT_TECHNICIANS]
    callers += [(f"header {h!r}", {"Authorization": h}, 401, "unauthorized") for h in
                ["Bearer ", "Basic dXNlcjpwYXNz", "ck_test-admin-secret-0123456789abcdef",
                 "Bearer " + "x" * 600]]
    for name, headers, status, code in callers:
        with cases.case(name):
            before = store_fingerprint(client)
            assert_error(client.post(CHANNELS, json={"id": "site-a.p1", **LINEAR}, headers=headers), status, code)
            assert store_fingerprint(client) == before
    cases.done()


def test_create_without_key_and_broken_json_is_401(client: TestClient, keys: Keys) -> None:
    """The key is checked before the body: a caller without a key learns nothing about
    how its body would be read."""
    before = store_fingerprint(client)
    r = send_text(client, "POST", CHANNELS, '{"id": "site-a.p1", "inputs": [', {})
    assert_error(r, 401, "unauthorized")
    assert store_fingerprint(client) == before


def _with(**changes: Any) -> dict[str, Any]:
    """LINEAR with these changes; inputs and an output given without a unit get one, so
    that the field a case is about is the only one at fault."""
    body: dict[str, Any] = {"id": "site-a.bad", **copy.deepcopy(LINEAR)}
    for k, v in changes.items():
        if v is _DROP:
            del body[k]
        elif k == "inputs" and isinstance(v, list):
            body[k] = [{"unit": "mV", **i} if isinstance(i, dict) else i for i in v]
        elif k == "output" and isinstance(v, dict):
            body[k] = {"unit": "V", **v}
        else:
            body[k] = v
    return body


_DROP = object()

BAD_CONFIGS = [
    # (case, body, the field the 422 names): every rule of the declaration (channel_config)
    ("unknown basis kind", _with(basis={"kind": "spline"}), "basis.kind"),
    ("degree 16", _with(basis={"kind": "poly", "degree": 16}), "basis.degree"),
    ("degree 0 through the origin", _with(basis={"kind": "poly", "degree": 0, "intercept": False}), "basis.degree"),
    ("degree 2.5", _with(basis={"kind": "poly", "degree": 2.5}), "basis.degree"),
    ("mu 2", _with(learner={"kind": "sgd", "schedule": {"kind": "normalized", "mu": 2}}), "learner.schedule.mu"),
    ("mu 0", _with(learner={"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0}}), "learner.schedule.mu"),
    ("unknown schedule", _with(learner={"schedule": {"kind": "adagrad"}}), "learner.schedule.kind"),
    ("step every 0", _with(learner={"schedule": {"kind": "step", "every": 0}}), "learner.schedule.every"),
    ("mu on a constant schedule", _with(learner={"schedule": {"kind": "constant", "mu": 0.1}}),
     "learner.schedule.mu"),
    ("min equal to max", _with(inputs=[{"name": "raw", "min": 5, "max": 5}]), "inputs[0]"),
    ("min above max", _with(inputs=[{"name": "raw", "min": 10, "max": 1}]), "inputs[0]"),
    ("input without max", _with(inputs=[{"name": "raw", "min": 0}]), "inputs[0].max"),
    ("min is a string", _with(inputs=[{"name": "raw", "min": "0", "max": 1}]), "inputs[0].min"),
    ("min is a boolean", _with(inputs=[{"name": "raw", "min": False, "max": 1}]), "inputs[0].min"),
    ("a name used twice", _with(inputs=[{"name": "raw", "min": 0, "max": 1}, {"name": "raw", "min": 0, "max": 1}]),
     "inputs[1].name"),
    ("nine inputs", _with(inputs=[{"min": 0, "max": 1}] * 9), "inputs"),
    ("missing inputs", _with(inputs=_DROP), "inputs"),
    ("empty inputs", _with(inputs=[]), "inputs"),
    ("extra field", _with(colour="blue"), "colour"),
    ("unknown field in basis", _with(basis={"kind": "poly", "degree": 1, "knots": [1]}), "basis.knots"),
    ("too many terms", _with(inputs=[{"min": 0, "max": 1}] * 8, basis={"kind": "poly", "degree": 5}),
     "basis.degree"),
    ("no intercept with two inputs", _with(inputs=[{"min": 0, "max": 1}] * 2,
                                           basis={"kind": "poly", "degree": 2, "intercept": False}),
     "basis.intercept"),
    ("knots outside the range", _with(basis={"kind": "hinge", "knots": [50, 100]}), "basis.knots"),
    ("knots decreasing", _with(basis={"kind": "hinge", "knots": [60, 40]}), "basis.knots"),
    ("hinge on two inputs", _with(inputs=[{"min": 0, "max": 1}] * 2, basis={"kind": "hinge", "knots": [0.5]}),
     "basis.kind"),
    ("log_poly on two inputs", _with(inputs=[{"min": 1, "max": 2}] * 2, basis={"kind": "log_poly"}), "basis.kind"),
    ("repeated power", _with(inputs=[{"min": 1, "max": 2}], basis={"kind": "log_poly", "powers": [0, 1, 1]}),
     "basis.powers"),
    ("one rbf centre", _with(basis={"kind": "rbf", "centers": 1}), "basis.centers"),
    ("rbf centre count with two inputs", _with(inputs=[{"min": 0, "max": 1}] * 2, basis={"kind": "rbf", "centers": 4}),
     "basis.centers"),
    ("rbf centre of the wrong size", _with(basis={"kind": "rbf", "centers": [10, [20, 30]]}), "basis.centers[1]"),
    ("rbf width 0", _with(basis={"kind": "rbf", "width": 0}), "basis.width"),
    ("unknown learner", _with(learner={"kind": "adam"}), "learner.kind"),
    ("forgetting 0", _with(learner={"kind": "rls", "forgetting": 0}), "learner.forgetting"),
    ("schedule on rls", _with(learner={"kind": "rls", "schedule": {"kind": "constant"}}), "learner.schedule"),
    ("unknown detector", _with(drift={"detector": "magic"}), "drift.detector"),
    ("negative tolerance", _with(drift={"tolerance": -0.1}), "drift.tolerance"),
    ("alarm below warning", _with(drift={"detector": "ewma", "warning": 5, "alarm": 4}), "drift.alarm"),
    ("delta on cusum", _with(drift={"detector": "cusum", "delta": 0.5}), "drift.delta"),
    ("mean_window 5", _with(drift={"mean_window": 5}), "drift.mean_window"),
    ("lambda 2", _with(drift={"detector": "ewma", "lambda": 2}), "drift.lambda"),
    ("unknown transform", _with(output={"transform": "sqrt"}), "output.transform"),
    ("outlier_sd 0", _with(outlier_sd=0), "outlier_sd"),
    ("snapshot_every 0", _with(snapshot_every=0), "snapshot_every"),
    ("coverage_factor 11", _with(coverage_factor=11), "coverage_factor"),
    ("description too long", _with(description="x" * 257), "description"),
    ("id with capitals", _with(id="Site-A.P1"), "id"),
    ("id too long", _with(id="a" * 129), "id"),
    ("missing id", _with(id=_DROP), "id"),
]


def loc_of(field: str) -> list[str]:
    """``inputs[1].name`` -> the error's loc, ["body", "inputs", "1", "name"]."""
    return ["body", *field.replace("[", ".").replace("]", "").split(".")]


def assert_names_field(err: dict[str, Any], field: str) -> None:
    """A 422 of the declaration: the message starts with the field, the first detail is at it."""
    assert err["message"].startswith(f"{field}: "), err
    assert err["details"][0]["loc"] == loc_of(field), err


def test_create_with_a_bad_config_is_422_naming_the_field(client: TestClient, keys: Keys) -> None:
    cases = Cases()
    for name, body, field in BAD_CONFIGS:
        with cases.case(name):
            before = store_fingerprint(client)
            err = assert_error(client.post(CHANNELS, json=body, headers=keys["technician"]), 422, "validation_error")
            assert_names_field(err, field)
            assert store_fingerprint(client) == before
    cases.done()


def test_create_log_poly_over_a_range_through_zero_is_422(client: TestClient, keys: Keys) -> None:
    """ln x needs x > 0: the range's lower end is the field at fault."""
    before = store_fingerprint(client)
    r = client.post(CHANNELS, json=_with(basis={"kind": "log_poly", "powers": [0, 1]}), headers=keys["technician"])
    err = assert_error(r, 422, "validation_error")
    assert_names_field(err, "inputs[0].min")
    assert "log_poly" in err["message"] and "above zero" in err["message"]
    assert store_fingerprint(client) == before


#: a body with units, opened up to its first input's range ("min": ..., "max": ...)
_BAD = '{"id": "site-a.bad", "output": {"unit": "V"}, "inputs": [{"name": "raw", "unit": "mV", '
NON_FINITE_CONFIGS = [
    ("min NaN", _BAD + '"min": NaN, "max": 1}]}', "inputs[0].min"),
    ("max Infinity", _BAD + '"min": 0, "max": Infinity}]}', "inputs[0].max"),
    ("min -1e400", _BAD + '"min": -1e400, "max": 1}]}', "inputs[0].min"),
    ("outlier_sd NaN", _BAD + '"min": 0, "max": 1}], "outlier_sd": NaN}', "outlier_sd"),
    ("tolerance NaN", _BAD + '"min": 0, "max": 1}], "drift": {"tolerance": NaN}}', "drift.tolerance"),
    ("coverage_factor NaN", _BAD + '"min": 0, "max": 1}], "coverage_factor": NaN}', "coverage_factor"),
]


def test_create_with_a_non_finite_number_is_422(client: TestClient, keys: Keys) -> None:
    """NaN, Infinity and 1e400 sent as raw JSON text."""
    cases = Cases()
    for name, text, field in NON_FINITE_CONFIGS:
        with cases.case(name):
            before = store_fingerprint(client)
            err = assert_error(send_text(client, "POST", CHANNELS, text, keys["technician"]), 422,
                               "validation_error")
            assert_names_field(err, field)
            assert store_fingerprint(client) == before
    cases.done()


def test_create_with_malformed_json_is_400(client: TestClient, keys: Keys) -> None:
    cases = Cases()
    for text in ['{"id": "site-a.p1", "inputs": [', "not json", '{"id": }', "{'id': 'site-a.p1'}"]:
        with cases.case(text):
            before = store_fingerprint(client)
            assert_error(send_text(client, "POST", CHANNELS, text, keys["technician"]), 400, "malformed_json")
            assert store_fingerprint(client) == before
    with cases.case("empty body"):  # a missing body, not broken JSON
        assert_error(send_text(client, "POST", CHANNELS, "", keys["technician"]), 422, "validation_error")
    cases.done()


def test_create_booleans_and_text_are_not_numbers(client: TestClient, keys: Keys) -> None:
    """true or "6" where a number belongs is refused, as for ``inputs[0].min`` (not read as
    1 / 6: ``"outlier_sd": true`` would gate at 1 s.d., ``"snapshot_every": true`` would
    snapshot on every sample)."""
    cases = Cases()
    for name, body, field in [("outlier_sd true", _with(outlier_sd=True), "outlier_sd"),
                              ("snapshot_every true", _with(snapshot_every=True), "snapshot_every"),
                              ("coverage_factor true", _with(coverage_factor=True), "coverage_factor"),
                              ("outlier_sd text", _with(outlier_sd="6"), "outlier_sd"),
                              ("snapshot_every text", _with(snapshot_every="50"), "snapshot_every")]:
        with cases.case(name):
            before = store_fingerprint(client)
            err = assert_error(client.post(CHANNELS, json=body, headers=keys["technician"]), 422,
                               "validation_error")
            assert_names_field(err, field)
            assert store_fingerprint(client) == before
    cases.done()


def test_create_with_an_existing_id_is_409(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    before = store_fingerprint(client)
    other = {"id": "site-a.p1", "inputs": [{"name": "v", "unit": "V", "min": -1, "max": 1}], "output": {"unit": "V"}}
    r = client.post(CHANNELS, json=other, headers=keys["technician"])
    assert_error(r, 409, "channel_exists")
    assert store_fingerprint(client) == before
    assert client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json()["inputs"][0]["name"] == "raw"


def test_create_fills_in_the_design_defaults(client: TestClient, keys: Keys) -> None:
    body = {"id": "site-a.p1", "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
            "output": {"unit": "kPa"}}
    r = client.post(CHANNELS, json=body, headers=keys["technician"])
    assert r.status_code == 201, r.text
    ch = r.json()
    assert ch["id"] == "site-a.p1"
    assert ch["inputs"] == [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0, "resolution": None,
                             "operating_range": None}]
    # the contract's defaults when a field is left out
    assert ch["basis"]["kind"] == "poly" and ch["basis"]["degree"] == 1
    assert ch["learner"]["kind"] == "sgd"
    assert ch["learner"]["schedule"]["kind"] == "normalized"
    assert ch["learner"]["schedule"]["mu"] == 0.1
    assert ch["drift"]["detector"] == "page_hinkley"
    assert ch["drift"]["tolerance"] is None  # no tolerance check
    assert ch["outlier_sd"] == 6.0
    assert ch["snapshot_every"] == 1000
    assert ch["output"] == {"name": "value", "unit": "kPa", "transform": "none", "offset": 0.0}  # "default none"
    assert ch["coverage_factor"] is None  # k from Student's t at the effective degrees of freedom
    assert ch["coverage"] == 0.95 and ch["reference"] is None and ch["range_margin"] == 1.0
    # the summary of a new channel
    assert ch["n_samples"] == 0
    assert ch["n_rejected"] == 0
    assert ch["version"] == 0
    assert ch["rmse"] is None
    assert ch["last_sample_at"] is None
    assert ch["drift"]["state"] == "ok"
    assert "statistic" in ch["drift"] and "tolerance_state" in ch["drift"]
    # what was answered is what is stored
    got = client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"])
    assert got.status_code == 200
    assert ch.pop("warnings") == []  # the create answer alone says what a person should know
    assert got.json() == ch


def test_create_the_design_example(client: TestClient, keys: Keys) -> None:
    r = client.post(CHANNELS, json=EXAMPLE, headers=keys["technician"])
    assert r.status_code == 201, r.text
    ch = r.json()
    assert ch["id"] == "coldroom2.probe07"
    assert ch["description"] == "thermistor probe, rack 2"
    assert ch["inputs"] == [{"name": "raw", "unit": "ohm", "min": 1000.0, "max": 40000.0, "resolution": 0.1,
                             "operating_range": None}]
    assert ch["reference"] == {"expanded_uncertainty": 0.02, "coverage_factor": 2.0, "distribution": "normal",
                               "instrument": None}
    assert ch["output"] == {"name": "temperature", "unit": "degC", "transform": "reciprocal",
                            "offset": 273.15}
    assert ch["basis"] == {"kind": "log_poly", "powers": [0, 1, 3]}
    assert ch["learner"]["schedule"]["mu"] == 0.2
    assert ch["drift"]["tolerance"] == 0.3
    assert ch["outlier_sd"] == 6.0 and ch["snapshot_every"] == 1000
    # the stored model is the core's model for that body
    direct = ChannelModel.from_config(channel_config(EXAMPLE))
    assert stored_state(client, "coldroom2.probe07") == direct.to_state()


def test_create_with_null_turns_the_gate_and_periodic_snapshots_off(client: TestClient, keys: Keys) -> None:
    body = {"id": "site-a.p1", **LINEAR, "outlier_sd": None, "snapshot_every": None}
    r = client.post(CHANNELS, json=body, headers=keys["admin"])
    assert r.status_code == 201, r.text
    assert r.json()["outlier_sd"] is None
    assert r.json()["snapshot_every"] is None
    got = client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json()
    assert got["outlier_sd"] is None and got["snapshot_every"] is None


# --------------------------------------------------------------------------------------
# GET /v1/channels
# --------------------------------------------------------------------------------------

def test_list_needs_a_technician_key(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    cases = Cases()
    for who, status, code in NOT_TECHNICIANS:
        with cases.case(str(who)):
            assert_error(client.get(CHANNELS, headers=headers_for(keys, who)), status, code)
            assert_error(client.get(f"{CHANNELS}?prefix=site-a.", headers=headers_for(keys, who)), status, code)
    cases.done()


def test_list_with_bad_query_is_422(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    cases = Cases()
    for query in ["limit=0", "limit=1001", "limit=-1", "limit=ten", "cursor=not-a-cursor",
                  "cursor=djE6YWJj",  # base64 of "v1:abc"
                  "cursor=" + "A" * 300, "state=broken", "prefix=" + "a" * 129]:
        with cases.case(query[:40]):
            r = client.get(f"{CHANNELS}?{query}", headers=keys["technician"])
            assert r.status_code == 422, r.text
            assert r.json()["error"]["code"] in CODES_422
    cases.done()


def test_list_filters_by_prefix(client: TestClient, keys: Keys, make_channel: Any) -> None:
    for cid in ["site-a.p1", "site-a.p2", "site-b.p1", "site_a.p1", "sitexa.p1"]:
        make_channel(cid)
    tech = keys["technician"]

    def ids(query: str) -> list[str]:
        r = client.get(f"{CHANNELS}?{query}", headers=tech)
        assert r.status_code == 200, r.text
        assert r.json()["next_cursor"] is None
        return [c["id"] for c in r.json()["items"]]

    assert ids("") == ["site-a.p1", "site-a.p2", "site-b.p1", "site_a.p1", "sitexa.p1"]
    assert ids("prefix=site-a.") == ["site-a.p1", "site-a.p2"]
    assert ids("prefix=site-b.") == ["site-b.p1"]
    # '_' and '.' are literal characters of an id, not wildcards
    assert ids("prefix=site_") == ["site_a.p1"]
    assert ids("prefix=site-a.p2") == ["site-a.p2"]
    assert ids("prefix=nothing") == []


def test_list_items_are_the_channel_views(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    item = client.get(CHANNELS, headers=keys["technician"]).json()["items"][0]
    assert item == client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json()


def test_list_filters_by_drift_state(client: TestClient, keys: Keys, make_channel: Any) -> None:
    for cid in ["site-a.p1", "site-a.p2", "site-b.p3"]:
        make_channel(cid)
    drive_into_alarm(client, "site-a.p2", keys["device"])
    post_samples(client, "site-a.p1", in_control(50, seed=3), keys["device"])
    tech = keys["technician"]

    def ids(query: str) -> list[str]:
        r = client.get(f"{CHANNELS}?{query}", headers=tech)
        assert r.status_code == 200, r.text
        return [c["id"] for c in r.json()["items"]]

    assert ids("state=alarm") == ["site-a.p2"]
    assert ids("state=ok") == ["site-a.p1", "site-b.p3"]
    assert ids("state=warning") == []
    assert ids("state=alarm&prefix=site-b.") == []
    assert ids("state=alarm&prefix=site-a.") == ["site-a.p2"]
    alarmed = client.get(f"{CHANNELS}?state=alarm", headers=tech).json()["items"][0]
    assert alarmed["drift"]["state"] == "alarm"


def test_list_pages_through_everything_with_next_cursor(client: TestClient, keys: Keys,
                                                        make_channel: Any) -> None:
    created = [f"site-a.c{i}" for i in range(5)]
    for cid in created:
        make_channel(cid)
    make_channel("site-b.other")
    seen: list[str] = []
    pages: list[int] = []
    cursor: str | None = None
    while True:
        url = f"{CHANNELS}?prefix=site-a.&limit=2" + (f"&cursor={cursor}" if cursor else "")
        r = client.get(url, headers=keys["technician"])
        assert r.status_code == 200, r.text
        page = r.json()
        assert set(page) == {"items", "next_cursor"}
        pages.append(len(page["items"]))
        seen.extend(c["id"] for c in page["items"])
        cursor = page["next_cursor"]
        if cursor is None:
            break
        assert len(pages) < 10
    assert pages == [2, 2, 1]
    assert seen == created


def test_list_last_full_page_has_no_next_cursor(client: TestClient, keys: Keys, make_channel: Any) -> None:
    for i in range(4):
        make_channel(f"site-a.c{i}")
    first = client.get(f"{CHANNELS}?limit=2", headers=keys["technician"]).json()
    second = client.get(f"{CHANNELS}?limit=2&cursor={first['next_cursor']}", headers=keys["technician"]).json()
    assert [c["id"] for c in second["items"]] == ["site-a.c2", "site-a.c3"]
    assert second["next_cursor"] is None


def test_list_default_and_largest_limit(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    for q in ["", "?limit=1000", "?limit=1"]:
        r = client.get(CHANNELS + q, headers=keys["technician"])
        assert r.status_code == 200, r.text
        assert [c["id"] for c in r.json()["items"]] == ["site-a.p1"]
        assert r.json()["next_cursor"] is None


# --------------------------------------------------------------------------------------
# GET /v1/channels/{id}
# --------------------------------------------------------------------------------------

def test_get_needs_a_technician_key(client: TestClient, keys: Keys, make_channel: Any) -> None:
    """Even a device key whose prefix matches may not read the channel's configuration."""
    make_channel("site-a.p1")
    cases = Cases()
    for who, status, code in NOT_TECHNICIANS:
        with cases.case(str(who)):
            assert_error(client.get(f"{CHANNELS}/site-a.p1", headers=headers_for(keys, who)), status, code)
    cases.done()


def test_get_an_unknown_channel_is_404(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    err = assert_error(client.get(f"{CHANNELS}/site-a.p9", headers=keys["technician"]), 404,
                       "channel_not_found")
    assert "site-a.p9" in err["message"]


def test_get_with_an_invalid_id_is_422(client: TestClient, keys: Keys) -> None:
    r = client.get(f"{CHANNELS}/Site-A.P1", headers=keys["technician"])
    assert_error(r, 422, "validation_error")


def test_get_summarises_the_samples(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    warm = in_control(200, seed=5)
    for s, minute in zip(warm, range(200), strict=True):
        s["t"] = f"2026-12-01T10:{minute // 60:02d}:{minute % 60:02d}Z"
    a = post_samples(client, "site-a.p1", warm, keys["device"])
    wild = {"x": 50.0, "y": 100.0 + 1000.0, "t": "2026-12-01T09:00:00Z"}  # older than the rest
    tail = in_control(9, seed=6)
    for s in tail:
        s["t"] = "2026-12-01T12:30:00+02:00"  # 10:30 UTC, the latest
    b = post_samples(client, "site-a.p1", [wild, *tail], keys["device"])
    assert [r["reason"] for r in b["rejected"]] == ["outlier"]

    ch = client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json()
    assert ch["n_samples"] == 210
    assert ch["n_rejected"] == 1
    assert ch["version"] == 210
    assert datetime.fromisoformat(ch["last_sample_at"]) == datetime.fromisoformat("2026-12-01T10:30:00+00:00")
    # rmse: the core's figure for the same stream, and by hand the running mean square of the
    # accepted samples' prior residuals that forgets the start-up transient: the n-th sample's
    # weight is min(1, max(4 / n, 1 / 500)) (the rule core/residuals.py states)
    direct = ChannelModel.from_config(channel_config({"id": "site-a.p1", **LINEAR}))
    stream = warm + [wild] + tail
    direct.learn([[s["x"]] for s in stream], [s["y"] for s in stream])
    assert ch["rmse"] == direct.summary()["rmse"]
    accepted = a["residuals"] + [r for i, r in enumerate(b["residuals"]) if i != 0]
    ms = 0.0
    for n, r in enumerate(accepted, start=1):
        ms += min(1.0, max(4.0 / n, 1.0 / 500)) * (r * r - ms)
    assert ch["rmse"] == pytest.approx(math.sqrt(ms), rel=1e-9)
    # not the plain root mean square, which the early residuals of the zero curve dominate
    assert ch["rmse"] < 0.5 * float(np.sqrt(np.mean(np.square(accepted))))
    assert ch["drift"]["state"] == direct.summary()["drift"]["state"]
    assert ch["drift"]["statistic"] == direct.summary()["drift"]["statistic"]


# --------------------------------------------------------------------------------------
# PATCH /v1/channels/{id}
# --------------------------------------------------------------------------------------

def test_patch_needs_a_technician_key(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    cases = Cases()
    for who, status, code in NOT_TECHNICIANS:
        with cases.case(str(who)):
            before = store_fingerprint(client)
            r = client.patch(f"{CHANNELS}/site-a.p1", json={"drift": {"tolerance": 0.5}},
                             headers=headers_for(keys, who))
            assert_error(r, status, code)
            assert store_fingerprint(client) == before
    cases.done()


def test_patch_an_unknown_channel_is_404(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    before = store_fingerprint(client)
    r = client.patch(f"{CHANNELS}/site-a.p9", json={"drift": {"tolerance": 0.5}}, headers=keys["technician"])
    assert_error(r, 404, "channel_not_found")
    assert store_fingerprint(client) == before


IMMUTABLE_CHANGES = [
    ("basis", {"basis": {"kind": "poly", "degree": 2}}),
    ("same basis", {"basis": {"kind": "poly", "degree": 1}}),
    ("inputs", {"inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 200}]}),
    ("output", {"output": {"name": "pressure", "unit": "Pa"}}),
    ("inputs resolution", {"inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100, "resolution": 0.01}]}),
    ("inputs null", {"inputs": None}),
    ("basis with a tolerance", {"basis": {"kind": "poly", "degree": 2}, "drift": {"tolerance": 0.5}}),
]


def test_patch_an_immutable_field_is_409_and_changes_nothing(client: TestClient, keys: Keys,
                                                             make_channel: Any) -> None:
    make_channel("site-a.p1")
    post_samples(client, "site-a.p1", in_control(10, seed=1), keys["device"])
    cases = Cases()
    for name, change in IMMUTABLE_CHANGES:
        with cases.case(name):
            before = store_fingerprint(client)
            r = client.patch(f"{CHANNELS}/site-a.p1", json=change, headers=keys["technician"])
            assert_error(r, 409, "immutable_field")
            assert store_fingerprint(client) == before
    cases.done()


BAD_CHANGES: list[tuple[str, dict[str, Any], str]] = [
    # (case, change, the field the 422 names): the merged settings go through the same declaration
    ("tolerance 0", {"drift": {"tolerance": 0}}, "drift.tolerance"),
    ("tolerance -1", {"drift": {"tolerance": -1}}, "drift.tolerance"),
    ("tolerance text", {"drift": {"tolerance": "wide"}}, "drift.tolerance"),
    ("detector", {"drift": {"detector": "magic"}}, "drift.detector"),
    ("warning above alarm", {"drift": {"warning": 20}}, "drift.alarm"),
    ("k on page_hinkley", {"drift": {"k": 0.5}}, "drift.k"),
    ("learner", {"learner": {"kind": "adam"}}, "learner.kind"),
    ("forgetting 1.5", {"learner": {"kind": "rls", "forgetting": 1.5}}, "learner.forgetting"),
    ("forgetting on sgd", {"learner": {"forgetting": 0.9}}, "learner.forgetting"),
    ("mu 2", {"learner": {"schedule": {"kind": "normalized", "mu": 2}}}, "learner.schedule.mu"),
    ("outlier_sd -1", {"outlier_sd": -1}, "outlier_sd"),
    ("outlier_sd text", {"outlier_sd": "six"}, "outlier_sd"),
    ("snapshot_every 0", {"snapshot_every": 0}, "snapshot_every"),
    ("snapshot_every 2.5", {"snapshot_every": 2.5}, "snapshot_every"),
    ("coverage_factor 0", {"coverage_factor": 0}, "coverage_factor"),
    ("coverage null", {"coverage": None}, "coverage"),
    ("coverage 1", {"coverage": 1.0}, "coverage"),
    ("range_margin null", {"range_margin": None}, "range_margin"),
    ("range_margin -1", {"range_margin": -1}, "range_margin"),
    ("reference without U", {"reference": {"coverage_factor": 2.0}}, "reference.expanded_uncertainty"),
    ("reference k 0", {"reference": {"expanded_uncertainty": 0.1, "coverage_factor": 0}},
     "reference.coverage_factor"),
    ("extra field", {"colour": "blue"}, "colour"),
    ("id", {"id": "site-a.p2"}, "id"),
]

BROKEN_CHANGES = [
    ("tolerance NaN", '{"drift": {"tolerance": NaN}}', 422, "validation_error"),
    ("tolerance Infinity", '{"drift": {"tolerance": Infinity}}', 422, "validation_error"),
    ("outlier_sd NaN", '{"outlier_sd": NaN}', 422, "validation_error"),
    ("unclosed", '{"drift": {"tolerance": 0.5}', 400, "malformed_json"),
    ("not json", "tolerance=0.5", 400, "malformed_json"),
]


def test_patch_with_bad_values_is_422_and_changes_nothing(client: TestClient, keys: Keys,
                                                          make_channel: Any) -> None:
    make_channel("site-a.p1")
    post_samples(client, "site-a.p1", in_control(10, seed=1), keys["device"])
    cases = Cases()
    for name, change, field in BAD_CHANGES:
        with cases.case(name):
            before = store_fingerprint(client)
            r = client.patch(f"{CHANNELS}/site-a.p1", json=change, headers=keys["technician"])
            assert_names_field(assert_error(r, 422, "validation_error"), field)
            assert store_fingerprint(client) == before
    for name, text, status, code in BROKEN_CHANGES:
        with cases.case(name):
            before = store_fingerprint(client)
            assert_error(send_text(client, "PATCH", f"{CHANNELS}/site-a.p1", text, keys["technician"]),
                         status, code)
            assert store_fingerprint(client) == before
    cases.done()


def test_patch_booleans_are_not_numbers(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    cases = Cases()
    for field in ["outlier_sd", "snapshot_every", "coverage_factor"]:
        with cases.case(f"{field} true"):
            before = store_fingerprint(client)
            r = client.patch(f"{CHANNELS}/site-a.p1", json={field: True}, headers=keys["technician"])
            assert_names_field(assert_error(r, 422, "validation_error"), field)
            assert store_fingerprint(client) == before
    cases.done()


def test_patch_changes_tolerance_and_learner(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1", drift={"detector": "cusum", "k": 0.7})
    first = in_control(40, seed=21)
    post_samples(client, "site-a.p1", first, keys["device"])
    old = client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json()
    old_state = stored_state(client, "site-a.p1")
    assert old["version"] == 40

    change = {"drift": {"tolerance": 0.5}, "learner": {"kind": "rls", "forgetting": 0.99}}
    r = client.patch(f"{CHANNELS}/site-a.p1", json=change, headers=keys["technician"])
    assert r.status_code == 200, r.text
    ch = r.json()
    assert ch["version"] == old["version"] + 1
    assert ch["n_samples"] == 40
    assert ch["drift"]["tolerance"] == 0.5
    assert ch["drift"]["detector"] == "cusum" and ch["drift"]["k"] == 0.7  # the rest of drift is kept
    # null: exact initialisation from the first samples (the default)
    assert ch["learner"] == {"kind": "rls", "forgetting": 0.99, "initial_covariance": None,
                             "covariance_bound": 10.0}
    for same in ("inputs", "output", "basis", "outlier_sd", "snapshot_every", "description"):
        assert ch[same] == old[same]
    assert client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json() == ch
    # the learned weights stay; only settings change
    assert stored_state(client, "site-a.p1")["weights"] == old_state["weights"]

    events = client.get(f"{CHANNELS}/site-a.p1/events?kind=settings_changed",
                        headers=keys["technician"]).json()["items"]
    assert len(events) == 1
    assert events[0]["version"] == ch["version"]
    assert events[0]["details"]["changes"] == change

    # what is learned next follows the new settings: same as the core with those settings
    direct = ChannelModel.from_config(channel_config({"id": "site-a.p1", **LINEAR,
                                                      "drift": {"detector": "cusum", "k": 0.7}}))
    direct.learn([[s["x"]] for s in first], [s["y"] for s in first])
    direct = direct.with_settings(channel_config({**direct.config,
                                                  "drift": {**direct.config["drift"], "tolerance": 0.5},
                                                  "learner": {"kind": "rls", "forgetting": 0.99}}))
    assert stored_state(client, "site-a.p1") == direct.to_state()
    second = in_control(20, seed=22)
    out = post_samples(client, "site-a.p1", second, keys["device"])
    res = direct.learn([[s["x"]] for s in second], [s["y"] for s in second])
    # null where the residual is unknown (the rls learner's exact start)
    assert out["residuals"] == [None if math.isnan(r) else r for r in res.residuals.tolist()]
    assert out["version"] == 61 and out["n_samples"] == 60
    assert stored_state(client, "site-a.p1") == direct.to_state()


BENCH = {"points": [{"x": x, "y": 3.0 + 0.5 * x + e} for x, e in
                   zip([0.0, 20.0, 40.0, 60.0, 80.0, 100.0], [0.02, -0.05, 0.03, 0.04, -0.01, -0.06], strict=True)]}


def test_patch_changes_the_uncertainty_settings_and_null_restores_students_t(client: TestClient, keys: Keys,
                                                                             make_channel: Any) -> None:
    """coverage_factor, coverage and reference reach the predictions; null (not a left-out
    field) puts k back to Student's t; range_margin reaches the out-of-range hold."""
    make_channel("site-a.p1")
    tech, url = keys["technician"], f"{CHANNELS}/site-a.p1"
    assert client.post(f"{url}/calibrate", json=BENCH, headers=tech).status_code == 200

    def predicted() -> dict[str, Any]:
        r = client.post(f"{url}/predict", json={"x": [50.0]}, headers=keys["device"])
        assert r.status_code == 200, r.text
        out: dict[str, Any] = r.json()
        return out

    t = predicted()
    dof = math.floor(t["dof"][0])  # GUM G.4.1: truncated to an integer
    assert t["k"] == [pytest.approx(float(stats.t.ppf(0.975, dof)), rel=1e-12)]  # Student's t, scipy

    def patch(change: dict[str, Any]) -> dict[str, Any]:
        r = client.patch(url, json=change, headers=tech)
        assert r.status_code == 200, r.text
        out: dict[str, Any] = r.json()
        return out

    ch = patch({"coverage_factor": 3.0})
    assert ch["coverage_factor"] == 3.0 and ch["coverage"] == 0.95
    fixed = predicted()
    assert fixed["k"] == [3.0] and fixed["U"] == [3.0 * fixed["u"][0]]
    # left out: kept
    assert patch({"description": "bench"})["coverage_factor"] == 3.0
    assert predicted()["k"] == [3.0]
    # null: Student's t again, now at 99 % coverage
    ch = patch({"coverage_factor": None, "coverage": 0.99})
    assert ch["coverage_factor"] is None and ch["coverage"] == 0.99
    assert predicted()["k"] == [pytest.approx(float(stats.t.ppf(0.995, dof)), rel=1e-12)]
    # a reference instrument of U = 0.2, k = 2: u^2 gains (0.2 / 2)^2 (GUM 4.3.3 and eq. 10)
    ch = patch({"reference": {"expanded_uncertainty": 0.2}})
    assert ch["reference"] == {"expanded_uncertainty": 0.2, "coverage_factor": 2.0, "distribution": "normal",
                               "instrument": None}
    with_ref = predicted()
    assert with_ref["u"][0] == pytest.approx(float(np.hypot(t["u"][0], 0.1)), rel=1e-12)
    assert patch({"reference": None})["reference"] is None
    assert predicted()["u"] == t["u"]
    # range_margin 0: a sample just past max is held as out of range (with 1, the default, it is learned)
    patch({"range_margin": 0.0})
    out = post_samples(client, "site-a.p1", [{"x": 100.5, "y": 53.25}], keys["device"])
    assert out["rejected"] == [{"index": 0, "reason": "out_of_range"}]
    patch({"range_margin": 1.0})
    assert post_samples(client, "site-a.p1", [{"x": 100.5, "y": 53.25}], keys["device"])["rejected"] == []
    events = client.get(f"{url}/events?kind=settings_changed", headers=tech).json()["items"]
    assert {"coverage_factor": None, "coverage": 0.99} in [e["details"]["changes"] for e in events]


def test_patch_a_schedule_keeps_the_other_learner_settings(client: TestClient, keys: Keys,
                                                           make_channel: Any) -> None:
    make_channel("site-a.p1", learner={"kind": "sgd", "l2": 0.01, "schedule": {"kind": "constant", "eta0": 0.02}})
    r = client.patch(f"{CHANNELS}/site-a.p1", json={"learner": {"schedule": {"kind": "normalized", "mu": 0.5}}},
                     headers=keys["technician"])
    assert r.status_code == 200, r.text
    assert r.json()["learner"] == {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.5, "eps": 1e-6},
                                   "l2": 0.01, "huber": None}
    assert r.json()["version"] == 1


def test_patch_guard_settings(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    r = client.patch(f"{CHANNELS}/site-a.p1", json={"outlier_sd": None, "snapshot_every": 50,
                                                    "description": "bench"}, headers=keys["admin"])
    assert r.status_code == 200, r.text
    ch = client.get(f"{CHANNELS}/site-a.p1", headers=keys["technician"]).json()
    assert ch["outlier_sd"] is None and ch["snapshot_every"] == 50 and ch["description"] == "bench"
    assert ch["version"] == 1


# units, warnings, and channels stored before units were required ---------------------------

def test_create_without_a_unit_is_422_naming_it(client: TestClient, keys: Keys) -> None:
    cases = Cases()
    for name, body, message in [
        ("input unit missing", {"id": "site-a.u", "inputs": [{"name": "raw", "min": 0, "max": 1}],
                                "output": {"unit": "V"}}, "inputs[0].unit: is required"),
        ("input unit blank", {"id": "site-a.u", "inputs": [{"name": "raw", "unit": "  ", "min": 0, "max": 1}],
                              "output": {"unit": "V"}}, "inputs[0].unit: must name the unit (e.g. degC, ohm, mV); "
                                                        "it is empty"),
        ("output unit missing", {"id": "site-a.u", **LINEAR, "output": {"name": "pressure"}},
         "output.unit: is required"),
        ("output missing", {"id": "site-a.u", "inputs": LINEAR["inputs"]}, "output: is required"),
    ]:
        with cases.case(name):
            err = expect_error(client, "POST", CHANNELS, 422, "validation_error", headers=keys["technician"],
                               json=body)
            assert err["message"] == message, err
    cases.done()


def test_create_answers_a_warning_for_a_polynomial_above_degree_7(client: TestClient, keys: Keys) -> None:
    """Common practice: a high-degree polynomial swings between the points it is fitted to."""
    high = ok(client.post(CHANNELS, json={"id": "site-a.d8", **LINEAR, "basis": {"kind": "poly", "degree": 8}},
                          headers=keys["technician"]), 201)
    (said,) = high["warnings"]
    assert said.startswith("basis.degree is 8: a polynomial of degree above 7 swings between"), said
    low = ok(client.post(CHANNELS, json={"id": "site-a.d3", **LINEAR, "basis": {"kind": "poly", "degree": 3}},
                         headers=keys["technician"]), 201)
    assert low["warnings"] == []
    # the channel as read has no warnings field: only the create answer speaks
    assert "warnings" not in ok(client.get(f"{CHANNELS}/site-a.d8", headers=keys["technician"]))


def test_a_channel_stored_without_units_is_read_listed_and_patched(client: TestClient, keys: Keys) -> None:
    """A store from before units were required: the channel row holds empty units."""
    config = channel_config({"id": "site-a.old", "inputs": [{"name": "raw", "min": 0, "max": 100}]})
    model = ChannelModel.from_config(config)
    with client.app.state.ctx.work.unit(write=True) as unit:  # type: ignore[attr-defined]
        unit.repo.create_channel("site-a.old", config, model.to_state(), summary_columns(model))
    tech = keys["technician"]
    assert ok(client.get(f"{CHANNELS}/site-a.old", headers=tech))["output"]["unit"] == ""
    assert [c["id"] for c in ok(client.get(CHANNELS, headers=tech))["items"]] == ["site-a.old"]
    patched = ok(client.patch(f"{CHANNELS}/site-a.old", json={"drift": {"tolerance": 0.5}}, headers=tech))
    assert patched["drift"]["tolerance"] == 0.5 and patched["inputs"][0]["unit"] == ""
