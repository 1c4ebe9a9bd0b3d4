"""Inputs a hostile or broken client can send: extreme times and numbers, paging cursors,
NUL characters, all-dot channel ids, loosely typed ids and unknown channels in a gateway
batch. Each is refused with the contract's error body and stores nothing, on both backends."""

from __future__ import annotations

import base64
from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.api.helpers import CODES_422, Cases, Keys, expect_error, ok

CH = "site-a.p1"
SAMPLES = f"/v1/channels/{CH}/samples"
GATEWAY = "/v1/samples"
CALIBRATE = f"/v1/channels/{CH}/calibrate"
PREDICT = f"/v1/channels/{CH}/predict"
ROLLBACK = f"/v1/channels/{CH}/rollback"
SNAPSHOTS = f"/v1/channels/{CH}/snapshots"
HUGE = 2**70

#: times that cannot be a sample's: out of the representable range once in UTC, before
#: 1970, or far ahead of the server's clock
BAD_TIMES = ["0001-01-01T00:00:00+14:00", "0001-01-01T00:00:00-14:00", "9999-12-31T23:59:59-14:00",
             "9999-12-31T23:59:59+14:00", "1969-12-31T23:59:59Z", "1900-01-01T00:00:00Z",
             "2999-01-01T00:00:00Z"]


@pytest.fixture
def channel(make_channel: Any) -> dict[str, Any]:
    return make_channel(CH)  # type: ignore[no-any-return]


def _cursor(text: str) -> str:
    return base64.urlsafe_b64encode(text.encode()).decode().rstrip("=")


def _field_named(err: dict[str, Any], name: str) -> bool:
    """The error's details name the field ``name`` (schema errors list locations; rules
    below the schema give ``field``)."""
    details = err.get("details")
    if isinstance(details, dict):
        return details.get("field") == name
    return any(name in [str(p) for p in d.get("loc", [])] or d.get("field") == name for d in details or [])


# 4. times and big numbers -------------------------------------------------------------

def test_sample_times_out_of_bounds_are_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    cases = Cases()
    for t in BAD_TIMES:
        with cases.case(f"channel {t}"):
            err = expect_error(client, "POST", SAMPLES, 422, CODES_422, headers=keys["device"],
                               json={"samples": [{"x": 1.0, "y": 2.0, "t": "2026-01-01T00:00:00Z"},
                                                 {"x": 1.0, "y": 2.0, "t": t}]})
            assert _field_named(err, "t"), err
        with cases.case(f"gateway {t}"):
            err = expect_error(client, "POST", GATEWAY, 422, CODES_422, headers=keys["device"],
                               json={"samples": [{"channel": CH, "x": 1.0, "y": 2.0, "t": t}]})
            assert _field_named(err, "t"), err
    cases.done()
    assert ok(client.get(f"/v1/channels/{CH}", headers=keys["admin"]))["last_sample_at"] is None


def test_sample_times_within_bounds_are_taken(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    body = {"samples": [{"x": 1.0, "y": 2.0, "t": "1970-01-01T00:00:00Z"},
                        {"x": 2.0, "y": 4.0, "t": "1970-01-01T14:00:00+14:00"},
                        {"x": 3.0, "y": 6.0, "t": "2026-06-01T00:00:00-14:00"}]}
    assert ok(client.post(SAMPLES, json=body, headers=keys["device"]))["accepted"] == 3


def test_the_clock_skew_allowed_is_a_setting(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    from datetime import UTC, datetime, timedelta

    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    skew = ctx.settings.max_clock_skew_s
    soon = (datetime.now(UTC) + timedelta(seconds=skew / 2)).isoformat()
    late = (datetime.now(UTC) + timedelta(seconds=skew + 3600)).isoformat()
    assert ok(client.post(SAMPLES, json={"samples": [{"x": 1.0, "y": 2.0, "t": soon}]}, headers=keys["device"]))
    err = expect_error(client, "POST", SAMPLES, 422, CODES_422, headers=keys["device"],
                       json={"samples": [{"x": 1.0, "y": 2.0, "t": soon}, {"x": 1.0, "y": 2.0, "t": late}]})
    assert err["details"]["index"] == 1 and err["details"]["field"] == "t", err


def test_calibrate_times_out_of_range_are_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    cases = Cases()
    for t in BAD_TIMES[:6]:
        for field in ("since", "until"):
            with cases.case(f"{field} {t}"):
                err = expect_error(client, "POST", CALIBRATE, 422, CODES_422, headers=keys["technician"],
                                   json={"include_history": True, field: t})
                assert _field_named(err, field), err
    cases.done()
    # a range reaching into the future is a fine selection of the stored samples
    ok(client.post(SAMPLES, json={"samples": [{"x": float(x), "y": 2.0 * x} for x in range(5)]},
                   headers=keys["device"]))
    out = ok(client.post(CALIBRATE, json={"include_history": True, "since": "1970-01-01T00:00:00Z",
                                          "until": "2999-01-01T00:00:00+14:00", "dry_run": True},
                         headers=keys["technician"]))
    assert out["n"] == 5


def test_huge_snapshot_ids_are_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    snap = ok(client.post(SNAPSHOTS, json={}, headers=keys["technician"]), 201)["id"]
    cases = Cases()
    for n in (HUGE, -HUGE, 2**63, 2**31):
        with cases.case(f"path {n}"):
            expect_error(client, "GET", f"{SNAPSHOTS}/{n}", 422, CODES_422, headers=keys["technician"])
        with cases.case(f"against {n}"):
            expect_error(client, "GET", f"{SNAPSHOTS}/{snap}", 422, CODES_422, headers=keys["technician"],
                         params={"against": str(n)})
        with cases.case(f"predict {n}"):
            expect_error(client, "POST", PREDICT, 422, CODES_422, headers=keys["device"],
                         text=f'{{"x": [1.0], "snapshot": {n}}}')
        with cases.case(f"rollback {n}"):
            expect_error(client, "POST", ROLLBACK, 422, CODES_422, headers=keys["technician"],
                         text=f'{{"snapshot": {n}}}')
    cases.done()


#: not a cursor of any list
BAD_CURSORS = ["v1:\x00", "v1:k_\x00", "v1:", "v2:5", "v1: 5", "v1:\u0663", "v1:" + "k" * 129]
#: not a cursor of a list paged by row number (the key list pages by key id)
BAD_NUMBER_CURSORS = ["v1:" + "9" * 30, "v1:" + "9" * 19, "v1:9223372036854775808", "v1:-1", "v1:5_0", "v1:k_1"]


def test_bad_cursors_are_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    cases = Cases()
    lists = [SAMPLES, SNAPSHOTS, f"/v1/channels/{CH}/events", "/v1/channels", "/v1/audit", "/v1/keys"]
    for url in lists:
        for text in BAD_CURSORS + (BAD_NUMBER_CURSORS if url != "/v1/keys" else []):
            with cases.case(f"{url} {text!r}"):
                err = expect_error(client, "GET", url, 422, CODES_422, headers=keys["admin"],
                                   params={"cursor": _cursor(text)})
                assert _field_named(err, "cursor"), err
        for raw in ["=" * 5000, "A" * 5000, "%%%", "\u00e9"]:
            with cases.case(f"{url} raw {raw[:8]!r}"):
                expect_error(client, "GET", url, 422, CODES_422, headers=keys["admin"], params={"cursor": raw})
    cases.done()


# 5. NUL characters ----------------------------------------------------------------------

NUL = "a\u0000b"


def test_nul_in_text_is_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    from curvekeeper.channel_config import EXAMPLE

    body = {**EXAMPLE, "id": "site-a.t1"}
    cases = Cases()
    posts: list[tuple[str, str, dict[str, Any], str]] = [
        ("source", SAMPLES, {"source": NUL, "samples": [{"x": 1.0, "y": 2.0, "seq": 1}]}, "device"),
        ("gateway source", GATEWAY, {"source": NUL, "samples": [{"channel": CH, "x": 1.0, "y": 2.0}]}, "device"),
        ("snapshot label", SNAPSHOTS, {"label": NUL}, "technician"),
        ("calibrate label", CALIBRATE, {"points": [{"x": 1.0, "y": 2.0}, {"x": 2.0, "y": 4.0}], "label": NUL},
         "technician"),
        ("key label", "/v1/keys", {"role": "technician", "label": NUL}, "admin"),
        ("description", "/v1/channels", {**body, "description": NUL}, "admin"),
        ("input name", "/v1/channels", {**body, "inputs": [{**body["inputs"][0], "name": NUL}]}, "admin"),
        ("input unit", "/v1/channels", {**body, "inputs": [{**body["inputs"][0], "unit": NUL}]}, "admin"),
        ("output name", "/v1/channels", {**body, "output": {**body["output"], "name": NUL}}, "admin"),
        ("output unit", "/v1/channels", {**body, "output": {**body["output"], "unit": NUL}}, "admin"),
    ]
    for name, url, payload, who in posts:
        with cases.case(name):
            expect_error(client, "POST", url, 422, CODES_422, headers=keys[who], json=payload)
    with cases.case("patched description"):
        expect_error(client, "PATCH", f"/v1/channels/{CH}", 422, CODES_422, headers=keys["technician"],
                     json={"description": NUL})
    with cases.case("other control characters"):
        expect_error(client, "POST", SNAPSHOTS, 422, CODES_422, headers=keys["technician"],
                     json={"label": "a\u001bb"})
    # query and path text reaches the store's WHERE clauses (PostgreSQL refused it with a 500)
    queries = [("/v1/channels?prefix=a%00b", "GET", "technician"), ("/v1/audit?kind=a%00", "GET", "admin"),
               ("/v1/audit?key_id=k%00", "GET", "admin"), (f"/v1/channels/{CH}/events?kind=x%00", "GET", "technician"),
               ("/v1/keys/k%00", "DELETE", "admin")]
    for url, method, who in queries:
        with cases.case(url):
            expect_error(client, method, url, 422, CODES_422, headers=keys[who])
    cases.done()
    # ordinary text, accented letters and spaces included, is still taken
    ok(client.post(SNAPSHOTS, json={"label": "étalonnage du banc 3"}, headers=keys["technician"]), 201)


# 6. channel ids of dots only --------------------------------------------------------------

def test_channel_ids_of_dots_only_are_422(client: TestClient, keys: Keys) -> None:
    from curvekeeper.channel_config import EXAMPLE

    cases = Cases()
    for cid in [".", "..", "...", "." * 128]:
        with cases.case(f"create {cid}"):
            err = expect_error(client, "POST", "/v1/channels", 422, "validation_error", headers=keys["admin"],
                               json={**EXAMPLE, "id": cid})
            assert _field_named(err, "id"), err
        with cases.case(f"key prefix {cid}"):
            err = expect_error(client, "POST", "/v1/keys", 422, "validation_error", headers=keys["admin"],
                               json={"role": "device", "prefixes": [cid]})
            assert _field_named(err, "prefixes"), err
        with cases.case(f"gateway {cid}"):
            err = expect_error(client, "POST", GATEWAY, 422, "validation_error", headers=keys["device"],
                               json={"samples": [{"channel": cid, "x": 1.0, "y": 2.0}]})
            assert _field_named(err, "channel"), err
    with cases.case("path ..."):
        expect_error(client, "GET", "/v1/channels/...", 422, "validation_error", headers=keys["admin"])
    cases.done()
    # dots inside an id, or leading ones, are still fine
    for cid in ["a.b", ".a", "a..", "-"]:
        ok(client.post("/v1/channels", json={**EXAMPLE, "id": cid}, headers=keys["admin"]), 201)
        ok(client.get(f"/v1/channels/{cid}", headers=keys["admin"]))


# 7. strict integers -----------------------------------------------------------------------

def test_ids_and_counts_must_be_json_integers(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    bench = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 26.0}, {"x": 100.0, "y": 51.2}]}
    ok(client.post(CALIBRATE, json=bench, headers=keys["technician"]))  # a curve to predict with
    snap = ok(client.post(SNAPSHOTS, json={}, headers=keys["technician"]), 201)["id"]
    cases = Cases()
    for loose in [f'"{snap}"', "true", f"{snap}.0", f"{snap}.5"]:
        with cases.case(f"predict {loose}"):
            err = expect_error(client, "POST", PREDICT, 422, "validation_error", headers=keys["device"],
                               text=f'{{"x": [1.0], "snapshot": {loose}}}')
            assert _field_named(err, "snapshot"), err
        with cases.case(f"rollback {loose}"):
            err = expect_error(client, "POST", ROLLBACK, 422, "validation_error", headers=keys["technician"],
                               text=f'{{"snapshot": {loose}}}')
            assert _field_named(err, "snapshot"), err
    for loose in ['"3"', "true", "3.5"]:
        with cases.case(f"calibrate last {loose}"):
            err = expect_error(client, "POST", CALIBRATE, 422, "validation_error", headers=keys["technician"],
                               text=f'{{"include_history": true, "last": {loose}}}')
            assert _field_named(err, "last"), err
        with cases.case(f"seq {loose}"):
            expect_error(client, "POST", SAMPLES, 422, "validation_error", headers=keys["device"],
                         text=f'{{"source": "gw", "samples": [{{"x": 1, "y": 2, "seq": {loose}}}]}}')
    cases.done()
    assert ok(client.post(PREDICT, json={"x": [1.0], "snapshot": snap}, headers=keys["device"]))["y"]


# 13. gateway batches are all or nothing --------------------------------------------------

def test_gateway_unknown_channel_names_the_sample_and_stores_nothing(
        client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.g1")
    make_channel("site-a.g2")
    body = {"samples": [{"channel": "site-a.g1", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.g2", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.g1", "x": 2.0, "y": 4.0},
                        {"channel": "site-a.zz", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.aa", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.zz", "x": 1.0, "y": 2.0}]}
    err = expect_error(client, "POST", GATEWAY, 404, "channel_not_found", headers=keys["device"], json=body)
    assert "'site-a.zz'" in err["message"] and "sample 3" in err["message"], err
    assert "nothing in this batch was stored" in err["message"], err
    assert err["details"] == {"index": 3, "channel": "site-a.zz"}, err


def test_gateway_bad_sample_says_nothing_was_stored(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.g1")
    body = {"samples": [{"channel": "site-a.g1", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.g1", "x": [1.0, 2.0], "y": 2.0}]}
    err = expect_error(client, "POST", GATEWAY, 422, "invalid_request", headers=keys["device"], json=body)
    assert "nothing in this batch was stored" in err["message"], err
    assert err["details"]["index"] == 1, err


# validation messages in the field's own words ----------------------------------------------

#: words of the validation library that must never reach a client's message, or a detail's msg or loc
LIBRARY_WORDS = ("constrained-float", "float_type", "list[", "Input should", "Field required", "Value error",
                 "Extra inputs", "after validation")


def test_a_bad_sample_is_named_by_its_plain_path_in_plain_words(client: TestClient, keys: Keys,
                                                                 channel: dict[str, Any]) -> None:
    cases = Cases()
    for name, sample, message, loc in [
        ("x a string", {"x": "a", "y": 1.0}, "samples[0].x: must be a finite number", ["samples", "0", "x"]),
        ("x in a list", {"x": [1.0, "a"], "y": 1.0}, "samples[0].x[1]: must be a finite number",
         ["samples", "0", "x", "1"]),
        ("x too large", {"x": 1e39, "y": 1.0}, "samples[0].x: must be at most 1e38", ["samples", "0", "x"]),
        ("y missing", {"x": 1.0}, "samples[0].y: is required", ["samples", "0", "y"]),
        ("unknown field", {"x": 1.0, "y": 1.0, "z": 1}, "samples[0].z: is not a known field",
         ["samples", "0", "z"]),
        ("seq a boolean", {"x": 1.0, "y": 1.0, "seq": True}, "samples[0].seq: must be a whole number",
         ["samples", "0", "seq"]),
    ]:
        with cases.case(name):
            err = expect_error(client, "POST", SAMPLES, 422, "validation_error", headers=keys["device"],
                               json={"samples": [sample]})
            assert err["message"] == message, err
            assert [d["loc"] for d in err["details"]] == [["body", *loc]], err
            # the details keep their stable ``type`` code; what a person reads is plain
            said = [err["message"], *(d["msg"] for d in err["details"]), *(p for d in err["details"] for p in d["loc"])]
            assert not any(w in text for w in LIBRARY_WORDS for text in said), err
    with cases.case("source too long"):
        err = expect_error(client, "POST", SAMPLES, 422, "validation_error", headers=keys["device"],
                           json={"source": "g" * 129, "samples": [{"x": 1.0, "y": 1.0}]})
        assert err["message"] == "source: must be at most 128 characters", err
    cases.done()
