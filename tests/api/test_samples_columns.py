"""The columnar samples body of ``POST /v1/channels/{id}/samples`` (``{"columns": {...}}``).

The same samples sent as rows and as columns to two channels of one configuration must
give the same answers, the same learned state and the same stored rows, and both must match
the core fed the samples directly (numpy for the residual summary). Every refused body is a
4xx with the contract's error body and leaves the store as it was; a value the row body
refuses is refused in columns with the same error type, at the same sample index.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from curvekeeper.store.tables import Channel, Sample
from fastapi.testclient import TestClient
from sqlalchemy import select

from tests.api.helpers import Cases, Keys, assert_error, stored_state
from tests.api.test_samples import (
    CHANNELS,
    CONFIGS,
    LINEAR,
    TWO_INPUTS,
    _read,
    create,
    direct_model,
    events,
    in_control,
    json_residuals,
    post,
    send_text,
    xy,
)
from tests.conftest import store_fingerprint


def columns(samples: list[dict[str, Any]], **extra: Any) -> dict[str, Any]:
    """Row samples as the columns of a columnar body (x, y; t and seq when the rows have them)."""
    cols: dict[str, Any] = {"x": [s["x"] for s in samples], "y": [s["y"] for s in samples]}
    for k in ("t", "seq"):
        if any(k in s for s in samples):
            cols[k] = [s[k] for s in samples]
    return {"columns": cols, **extra}


def stored_rows(client: TestClient, channel_id: str) -> list[tuple[Any, ...]]:
    """Every stored column of the channel's samples but the receive time, in seq order."""
    return [tuple(r) for r in _read(client, select(
        Sample.seq, Sample.version, Sample.source, Sample.source_seq, Sample.t, Sample.x, Sample.y, Sample.residual,
        Sample.drift_statistic, Sample.accepted, Sample.reason, Sample.reference)
        .join(Channel, Channel.pk == Sample.channel_pk).where(Channel.id == channel_id).order_by(Sample.seq))]


def timed(samples: list[dict[str, Any]], start: datetime, seq0: int = 1) -> list[dict[str, Any]]:
    """The samples one minute apart from ``start``, numbered from ``seq0``."""
    return [{**s, "t": (start + timedelta(minutes=i)).isoformat().replace("+00:00", "Z"), "seq": seq0 + i}
            for i, s in enumerate(samples)]


def learned_events(client: TestClient, channel_id: str, keys: Keys) -> list[tuple[Any, ...]]:
    """(kind, version, details) of the events learning wrote (not the channel's creation)."""
    return [(e["kind"], e["version"], e["details"]) for e in events(client, channel_id, keys["technician"])
            if e["kind"] != "channel_created"]


T0 = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)


# --------------------------------------------------------------------------------------
# the same samples as rows and as columns
# --------------------------------------------------------------------------------------

def test_columns_learn_as_rows_do_and_as_the_core_does(client: TestClient, keys: Keys) -> None:
    """Every kind of channel (one input and two), batches of 1, 49 and 70 with times and seqs,
    and a wild reference held back past the warm-up: answers, state and stored rows agree."""
    cases = Cases()
    dev = keys["device"]
    for k, (name, (body, make)) in enumerate(CONFIGS.items()):
        with cases.case(name):
            rows_id, cols_id = f"site-a.r{k}", f"site-a.k{k}"
            create(client, keys["admin"], rows_id, body)
            create(client, keys["admin"], cols_id, body)
            samples = timed(make(120, 31), T0)
            samples[80] = {**samples[80], "y": samples[80]["y"] + 1e6}  # an outlier, held back
            direct = direct_model(cols_id, body)
            for part in (samples[:1], samples[1:50], samples[50:]):
                by_rows = post(client, rows_id, {"source": "gw-3", "samples": part}, dev)
                by_cols = post(client, cols_id, columns(part, source="gw-3"), dev)
                res = direct.learn(*xy(part))
                assert by_cols.pop("quality") == {**direct.quality(), "stale": False}
                assert by_cols == by_rows
                assert by_cols["residuals"] == json_residuals(res)
                assert stored_state(client, cols_id) == stored_state(client, rows_id) == direct.to_state()
            if body is LINEAR:
                assert by_cols["rejected"] == [{"index": 30, "reason": "outlier"}]
            assert stored_rows(client, cols_id) == stored_rows(client, rows_id)
            assert np.array_equal(np.array(direct.to_state()["weights"]),
                                  np.array(stored_state(client, cols_id)["weights"]))
            assert learned_events(client, cols_id, keys) == learned_events(client, rows_id, keys)
    cases.done()


def test_two_inputs_take_x_as_one_row_a_sample(client: TestClient, keys: Keys) -> None:
    create(client, keys["admin"], "site-a.two", TWO_INPUTS)
    create(client, keys["admin"], "site-a.one", LINEAR)
    cases = Cases()
    for cid, x in [("site-a.two", [1.0, 2.0]), ("site-a.one", [1.0, 2.0]), ("site-a.one", [3.0])]:
        with cases.case(f"{cid} {x}"):
            width = 2 if cid == "site-a.two" else 1
            body = {"columns": {"x": [x, x], "y": [1.0, 2.0]}}
            if len(x) == width:  # x as rows of the channel's width: learned
                assert post(client, cid, body, keys["device"])["accepted"] == 2
            else:
                before = store_fingerprint(client)
                r = client.post(f"{CHANNELS}/{cid}/samples", json=body, headers=keys["device"])
                err = assert_error(r, 422, "invalid_request")
                assert err["details"] == {"index": 0, "field": "x"}
                assert store_fingerprint(client) == before
    with cases.case("two inputs given as one number a sample"):
        before = store_fingerprint(client)
        r = client.post(f"{CHANNELS}/site-a.two/samples", json={"columns": {"x": [1.0], "y": [1.0]}},
                        headers=keys["device"])
        assert assert_error(r, 422, "invalid_request")["details"] == {"index": 0, "field": "x"}
        assert store_fingerprint(client) == before
    cases.done()


def test_a_columnar_retry_learns_nothing_twice(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.c")
    make_channel("site-a.r")
    dev = keys["device"]
    s = timed(in_control(8, seed=5), T0)
    first = post(client, "site-a.c", columns(s[:5], source="gw-3"), dev)
    assert (first["accepted"], first["duplicates"], first["version"]) == (5, 0, 5)
    before = store_fingerprint(client)
    again = post(client, "site-a.c", columns(s[:5], source="gw-3"), dev)
    assert (again["accepted"], again["duplicates"], again["version"], again["n_samples"]) == (0, 5, 5, 5)
    assert again["residuals"] == [None] * 5
    assert store_fingerprint(client) == before
    # half old, half new, and a seq twice in the batch: the first occurrence counts, as in rows
    body = columns([s[3], s[4], s[5], s[6], {**s[7], "seq": s[5]["seq"]}], source="gw-3")
    mixed = post(client, "site-a.c", body, dev)
    assert (mixed["accepted"], mixed["duplicates"], mixed["version"]) == (2, 3, 7)
    assert [r is None for r in mixed["residuals"]] == [True, True, False, False, True]
    # the same requests as rows leave the same channel
    post(client, "site-a.r", {"source": "gw-3", "samples": s[:5]}, dev)
    post(client, "site-a.r", {"source": "gw-3", "samples": s[:5]}, dev)
    rows = post(client, "site-a.r", {"source": "gw-3", "samples": [s[3], s[4], s[5], s[6],
                                                                   {**s[7], "seq": s[5]["seq"]}]}, dev)
    assert {k: v for k, v in mixed.items() if k != "quality"} == rows
    assert stored_state(client, "site-a.c") == stored_state(client, "site-a.r")
    assert stored_rows(client, "site-a.c") == stored_rows(client, "site-a.r")
    # a source with COPY's escape characters in it is stored as it came
    odd = "gw\\3 \\N"
    post(client, "site-a.c", columns(timed(in_control(2, seed=6), T0, seq0=100), source=odd), dev)
    assert [r[2] for r in stored_rows(client, "site-a.c")[-2:]] == [odd, odd]
    # a summary retry answers the same counts
    summary = post(client, "site-a.c", {**body, "answer": "summary"}, dev)
    assert (summary["accepted"], summary["duplicates"], summary["version"]) == (0, 5, 9)
    assert summary["residuals"] == {"count": 0, "mean": None, "sd": None, "max_abs": None}


def test_the_summary_answer(client: TestClient, keys: Keys, make_channel: Any) -> None:
    """count, mean, s.d. (n - 1) and max |r| of the stored samples' residuals, as numpy gives
    them from the full answer's residuals; held-back samples counted by reason."""
    make_channel("site-a.s")
    make_channel("site-a.f")
    dev = keys["device"]
    s = in_control(60, seed=9)
    s[45] = {**s[45], "y": 1e6}
    s[50] = {**s[50], "x": 9.9e37}  # a meter's overload code: stored, out of range
    full = post(client, "site-a.f", columns(s, answer="full"), dev)
    summary = post(client, "site-a.s", columns(s, answer="summary"), dev)
    r = np.array([v for v in full["residuals"] if v is not None])
    assert summary["residuals"]["count"] == r.size == 59  # the overload code's residual is not finite
    assert summary["residuals"]["mean"] == pytest.approx(np.mean(r), rel=1e-12)
    assert summary["residuals"]["sd"] == pytest.approx(np.std(r, ddof=1), rel=1e-12)
    assert summary["residuals"]["max_abs"] == pytest.approx(np.max(np.abs(r)), rel=1e-12)
    assert summary["rejected"] == {"outlier": 1, "out_of_range": 1}
    assert {x["reason"] for x in full["rejected"]} == {"outlier", "out_of_range"}
    for k in ("accepted", "duplicates", "version", "n_samples", "drift", "quality"):
        assert summary[k] == full[k], k
    assert set(summary["quality"]) == {"calibrated", "drift", "tolerance", "service", "warming_up", "stale"}
    # no t: each sample's time is its request's receipt
    assert [r[:4] + r[5:] for r in stored_rows(client, "site-a.s")] == [
        r[:4] + r[5:] for r in stored_rows(client, "site-a.f")]
    one = post(client, "site-a.s", columns([{"x": 1.0, "y": 2.0}], answer="summary"), dev)
    assert one["residuals"]["count"] == 1 and one["residuals"]["sd"] is None


# --------------------------------------------------------------------------------------
# refused bodies: 4xx, the contract's error body, nothing stored
# --------------------------------------------------------------------------------------

GOOD = {"x": [1.0, 2.0, 3.0, 4.0], "y": [2.0, 4.0, 6.0, 8.0]}

#: (name, column, bad value at index 2, the row body's field) for values the row body refuses
BAD_VALUES: list[tuple[str, str, Any, str]] = [
    ("y a string", "y", "6", "y"), ("y a boolean", "y", True, "y"), ("y null", "y", None, "y"),
    ("y too large", "y", 1e16, "y"), ("y too small", "y", -1e16, "y"), ("x a string", "x", "hot", "x"),
    ("x a boolean", "x", False, "x"), ("x beyond 1e38", "x", 1e39, "x"),
    ("x an object", "x", {"v": 1}, "x"),
    ("seq negative", "seq", -1, "seq"), ("seq a float", "seq", 3.0, "seq"), ("seq a boolean", "seq", True, "seq"),
    ("seq beyond 2^62", "seq", 2**62 + 1, "seq"), ("seq beyond int64", "seq", 2**64, "seq"),
    ("t without a zone", "t", "2026-12-01T10:00:00", "t"), ("t a number", "t", 1764583200, "t"),
    ("t not a time", "t", "yesterday", "t"), ("t before 1970", "t", "1969-12-31T23:00:00Z", "t"),
]


def _with_bad(column: str, value: Any) -> dict[str, Any]:
    cols = {**GOOD, "seq": [1, 2, 3, 4], "t": ["2026-12-01T10:00:00Z"] * 4}
    cols[column] = [*cols[column][:2], value, *cols[column][3:]]
    return {"source": "gw-3", "columns": cols}


def test_a_bad_value_is_refused_as_the_row_body_refuses_it(client: TestClient, keys: Keys,
                                                           make_channel: Any) -> None:
    make_channel("site-a.p1")
    url = f"{CHANNELS}/site-a.p1/samples"
    cases = Cases()
    for name, column, value, field in BAD_VALUES:
        with cases.case(name):
            body = _with_bad(column, value)
            before = store_fingerprint(client)
            err = assert_error(client.post(url, json=body, headers=keys["device"]), 422, "validation_error")
            assert store_fingerprint(client) == before
            cols = body["columns"]
            rows = {"source": "gw-3", "samples": [{k: cols[k][i] for k in cols} for i in range(4)]}
            row_err = assert_error(client.post(url, json=rows, headers=keys["device"]), 422, "validation_error")
            assert store_fingerprint(client) == before
            assert err["details"][0]["loc"][:4] == ["body", "columns", column, "2"], err
            assert row_err["details"][0]["loc"][:4] == ["body", "samples", "2", field], row_err
            assert err["details"][0]["type"] == row_err["details"][0]["type"]
            assert err["details"][0]["msg"] == row_err["details"][0]["msg"]
    cases.done()


#: JSON text the standard parser takes but that holds no finite number
NON_FINITE = ['{"columns": {"x": [1, 2, NaN], "y": [1, 2, 3]}}',
              '{"columns": {"x": [1, 2, 3], "y": [1, 2, Infinity]}}',
              '{"columns": {"x": [1, 2, 3], "y": [1, 2, -Infinity]}}',
              '{"columns": {"x": [1, 2, 3], "y": [1, 2, 1e400]}}',
              '{"columns": {"x": [[1], [2], [NaN]], "y": [1, 2, 3]}}']


@pytest.mark.parametrize("text", NON_FINITE)
def test_non_finite_values_are_refused(client: TestClient, keys: Keys, make_channel: Any, text: str) -> None:
    make_channel("site-a.p1")
    before = store_fingerprint(client)
    err = assert_error(send_text(client, f"{CHANNELS}/site-a.p1/samples", text, keys["device"]), 422,
                       "validation_error")
    assert err["details"][0]["type"] == "finite_number"
    assert err["details"][0]["loc"][3] == "2"
    assert store_fingerprint(client) == before


REFUSED: list[tuple[str, Any, int, str, Any]] = [
    # (name, body, status, code, details or a predicate's expected first loc)
    ("columns of different lengths", {"columns": {"x": [1.0, 2.0], "y": [1.0]}}, 422, "invalid_request",
     {"index": 1, "field": "x"}),
    ("t shorter than y", {"columns": {**GOOD, "t": ["2026-12-01T10:00:00Z"]}}, 422, "invalid_request",
     {"index": 1, "field": "t"}),
    ("seq longer than y", {"columns": {**GOOD, "seq": [1, 2, 3, 4, 5]}}, 422, "invalid_request",
     {"index": 4, "field": "seq"}),
    ("x rows of different widths", {"columns": {"x": [[1.0], [2.0], [3.0, 4.0]], "y": [1.0, 2.0, 3.0]}}, 422,
     "invalid_request", {"index": 2, "field": "x"}),
    ("x numbers and rows mixed", {"columns": {"x": [1.0, [2.0]], "y": [1.0, 2.0]}}, 422, "validation_error",
     ["body", "columns", "x", "1"]),
    ("x rows and numbers mixed", {"columns": {"x": [[1.0], 2.0], "y": [1.0, 2.0]}}, 422, "validation_error",
     ["body", "columns", "x", "1"]),
    ("a string in an x row", {"columns": {"x": [[1.0], ["a"]], "y": [1.0, 2.0]}}, 422, "validation_error",
     ["body", "columns", "x", "1", "0"]),
    ("y empty", {"columns": {"x": [], "y": []}}, 422, "validation_error", ["body", "columns", "y"]),
    ("y missing", {"columns": {"x": [1.0]}}, 422, "validation_error", ["body", "columns", "y"]),
    ("x missing", {"columns": {"y": [1.0]}}, 422, "validation_error", ["body", "columns", "x"]),
    ("y not a list", {"columns": {"x": [1.0], "y": 1.0}}, 422, "validation_error", ["body", "columns", "y"]),
    ("an unknown column", {"columns": {**GOOD, "u": [1, 2, 3, 4]}}, 422, "validation_error",
     ["body", "columns", "u"]),
    ("columns not an object", {"columns": [[1.0, 2.0]]}, 422, "validation_error", ["body", "columns"]),
    ("an unknown answer", {"columns": GOOD, "answer": "brief"}, 422, "validation_error", ["body", "answer"]),
    ("an unknown field", {"columns": GOOD, "extra": 1}, 422, "validation_error", ["body", "extra"]),
    ("rows and columns at once", {"columns": GOOD, "samples": [{"x": 1.0, "y": 2.0}]}, 422, "validation_error",
     ["body", "columns"]),
    ("an empty source", {"columns": GOOD, "source": ""}, 422, "validation_error", ["body", "source"]),
    ("t ahead of the clock", {"columns": {**GOOD, "t": ["2026-12-01T10:00:00Z"] * 3 + ["2999-01-01T00:00:00Z"]}},
     422, "invalid_request", {"index": 3, "field": "t"}),
    ("an unknown reference", {"columns": GOOD, "reference": "no-such-reference"}, 404, "reference_not_found", None),
]


def test_refused_bodies_store_nothing(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    cases = Cases()
    for name, body, status, code, expect in REFUSED:
        with cases.case(name):
            before = store_fingerprint(client)
            r = client.post(f"{CHANNELS}/site-a.p1/samples", json=body, headers=keys["device"])
            err = assert_error(r, status, code)
            if isinstance(expect, dict):
                assert err["details"] == expect
            elif expect is not None:
                assert err["details"][0]["loc"] == expect, err
            assert store_fingerprint(client) == before
    cases.done()


def test_the_channel_and_the_key_are_checked_as_for_rows(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    make_channel("site-a.req", require_reference=True)
    make_channel("site-b.p1")
    body = {"columns": GOOD}
    cases = Cases()
    for name, cid, headers, status, code in [
            ("no key", "site-a.p1", {}, 401, "unauthorized"),
            ("another prefix", "site-b.p1", keys["device"], 403, "forbidden"),
            ("unknown channel", "site-a.none", keys["device"], 404, "channel_not_found"),
            ("reference required", "site-a.req", keys["device"], 422, "reference_required")]:
        with cases.case(name):
            before = store_fingerprint(client)
            assert_error(client.post(f"{CHANNELS}/{cid}/samples", json=body, headers=headers), status, code)
            assert store_fingerprint(client) == before
    cases.done()


def test_more_columns_than_the_batch_allows_are_413(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1")
    before = store_fingerprint(client)
    n = 10_001
    text = json.dumps({"columns": {"x": [1.5] * n, "y": [3.0] * n}})
    err = assert_error(send_text(client, f"{CHANNELS}/site-a.p1/samples", text, keys["device"]), 413,
                       "payload_too_large")
    assert err["details"] == {"max_batch": 10_000}
    # one long column is enough
    text = json.dumps({"columns": {"x": [1.5], "y": [3.0], "seq": list(range(n))}})
    assert_error(send_text(client, f"{CHANNELS}/site-a.p1/samples", text, keys["device"]), 413, "payload_too_large")
    assert store_fingerprint(client) == before
    ok = json.dumps({"columns": {"x": [1.5] * 10_000, "y": [3.0] * 10_000}, "answer": "summary"})
    out = send_text(client, f"{CHANNELS}/site-a.p1/samples", ok, keys["device"])
    assert out.status_code == 200, out.text
    assert out.json()["accepted"] + sum(out.json()["rejected"].values()) == 10_000


def test_a_failed_columnar_request_leaves_learning_untouched(client: TestClient, keys: Keys,
                                                             make_channel: Any) -> None:
    """A bad value in the last sample: nothing of the batch is learned, and the next good
    request learns as if the failed one had never come."""
    make_channel("site-a.p1")
    make_channel("site-a.p2")
    s = in_control(30, seed=3)
    bad = columns(s)
    bad["columns"]["y"][-1] = "oops"
    r = client.post(f"{CHANNELS}/site-a.p1/samples", json=bad, headers=keys["device"])
    assert_error(r, 422, "validation_error")
    a = post(client, "site-a.p1", columns(s), keys["device"])
    b = post(client, "site-a.p2", columns(s), keys["device"])
    assert a == b
    assert stored_state(client, "site-a.p1") == stored_state(client, "site-a.p2")


# --------------------------------------------------------------------------------------
# t's common form, read without pydantic
# --------------------------------------------------------------------------------------

TIMES = ["2026-12-01T10:00:00Z", "2026-12-01T10:00:00.5Z", "2026-12-01T10:00:00.123456+02:00",
         "2026-12-01T10:00:00-05:30", "2026-12-01T10:00:00+23:59", "2026-12-01T10:00:00+24:00",
         "2026-02-30T10:00:00Z", "2026-12-01T24:00:00Z", "2026-12-01T23:59:60Z", "2026-13-01T10:00:00Z",
         "1969-12-31T23:59:59Z", "1970-01-01T00:00:00Z", "1970-01-01T01:00:00+01:00", "1970-01-01T00:30:00+01:00",
         "9998-12-31T23:59:59Z", "9999-01-01T00:00:00Z", "9998-12-31T23:00:00-01:00", "0001-01-01T00:00:00+14:00",
         "2026-12-01T10:00:00", "2026-12-01 10:00:00Z", "2026-12-01T10:00Z", "2026-12-01T10:00:00.1234567Z",
         "2026-12-01t10:00:00z", "20261201T100000Z", "2026-12-01T10:00:00+0200"]


@pytest.mark.parametrize("text", TIMES)
def test_the_common_time_form_reads_as_pydantic_reads_it(text: str) -> None:
    """Where the quick reader takes a time, pydantic (the row body's reader) takes it as
    the same instant with the same offset; what pydantic refuses, the quick reader leaves
    to pydantic (so the error is the row body's)."""
    from curvekeeper.api.schemas.common import When
    from curvekeeper.api.schemas.samples_columns import _common_times
    from pydantic import TypeAdapter, ValidationError

    quick = _common_times([text])
    try:
        slow = TypeAdapter(When).validate_python(text)
    except ValidationError:
        assert quick is None
        return
    if quick is not None:
        assert quick[0] == slow and quick[0].utcoffset() == slow.utcoffset()
        assert quick[0].isoformat() == slow.isoformat()


def test_the_common_form_is_read_quickly_for_a_whole_column() -> None:
    from curvekeeper.api.schemas.samples_columns import _common_times

    assert _common_times(["2026-12-01T10:00:00Z", "2026-12-01T10:00:01.25+01:00"]) is not None
    assert _common_times(["2026-12-01T10:00:00Z", "2026-12-01 10:00:01Z"]) is None  # one other form: all to pydantic
    assert _common_times(["2026-12-01T10:00:00Z", 5]) is None
