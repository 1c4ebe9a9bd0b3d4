"""The columnar gateway body of ``POST /v1/samples`` (``{"columns": {"channel": [...], ...}}``).

The same samples sent as rows and as columns to two sets of channels of the same
configurations must give the same answers, the same learned state and the same stored rows,
and both must match the core fed each channel's samples directly. The summary answer is held
to numpy over the full answer's residuals. Every refused body is a 4xx with the contract's
error body, names the sample's index in the request (not in its channel's group) and leaves
the store as it was.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from tests.api.helpers import Cases, Keys, assert_error, stored_state
from tests.api.test_samples import (
    GATEWAY,
    LINEAR,
    TWO_INPUTS,
    create,
    direct_model,
    in_control,
    json_residuals,
    send_text,
    two_input_samples,
    xy,
)
from tests.api.test_samples_columns import stored_rows
from tests.conftest import store_fingerprint

T0 = datetime(2026, 11, 30, 8, 0, tzinfo=UTC)
#: channel -> (configuration, samples maker); "one" and "two" differ in their number of inputs
KINDS: dict[str, tuple[dict[str, Any], Any]] = {
    "one": (LINEAR, in_control),
    "two": (TWO_INPUTS, two_input_samples),
    "rls": ({**LINEAR, "learner": {"kind": "rls", "forgetting": 0.995}}, in_control),
}


def gateway(client: TestClient, body: dict[str, Any], headers: dict[str, str]) -> dict[str, Any]:
    r = client.post(GATEWAY, json=body, headers=headers)
    assert r.status_code == 200, r.text
    out: dict[str, Any] = r.json()
    return out


def as_columns(rows: list[dict[str, Any]], *, x_rows: bool = True, **extra: Any) -> dict[str, Any]:
    """A row gateway body's samples as columns: x one list a sample (``x_rows``) or one number."""
    def x_of(s: dict[str, Any]) -> Any:
        if x_rows:
            return s["x"] if isinstance(s["x"], list) else [s["x"]]
        return s["x"]
    cols: dict[str, Any] = {"channel": [s["channel"] for s in rows], "x": [x_of(s) for s in rows],
                            "y": [s["y"] for s in rows]}
    for k in ("t", "seq"):
        if any(k in s for s in rows):
            cols[k] = [s[k] for s in rows]
    return {"columns": cols, **extra}


def mixed_batch(n_each: int, seed: int, prefix: str, kinds: tuple[str, ...] = tuple(KINDS)) -> list[dict[str, Any]]:
    """Each kind's samples (channel ``prefix + kind``), interleaved at random keeping each
    channel's own order, timed a minute apart and numbered from 1."""
    rng = np.random.default_rng(seed)
    queues = {k: KINDS[k][1](n_each, seed + i) for i, k in enumerate(kinds)}
    order = rng.permutation(np.repeat(kinds, n_each))
    rows = [{"channel": prefix + str(k), **queues[str(k)].pop(0)} for k in order]
    return [{**s, "t": (T0 + timedelta(minutes=i)).isoformat().replace("+00:00", "Z"), "seq": i + 1}
            for i, s in enumerate(rows)]


def renamed(rows: list[dict[str, Any]], old: str, new: str) -> list[dict[str, Any]]:
    return [{**s, "channel": s["channel"].replace(old, new)} for s in rows]


def unprefixed(answer: dict[str, Any], prefix: str) -> dict[str, Any]:
    """A gateway answer with the channel ids' ``prefix`` taken off (to compare two sets)."""
    out = json.loads(json.dumps(answer).replace(f'"{prefix}', '"'))
    assert isinstance(out, dict)
    return out


def core_residuals(rows: list[dict[str, Any]], prefix: str, direct: dict[str, Any]) -> list[float | None]:
    """The residuals the core's models (``direct``, by kind) give each channel's samples of
    ``rows``, in request order."""
    out: list[float | None] = [None] * len(rows)
    for k, model in direct.items():
        idx = [i for i, s in enumerate(rows) if s["channel"] == prefix + k]
        if idx:
            for i, r in zip(idx, json_residuals(model.learn(*xy([rows[i] for i in idx]))), strict=True):
                out[i] = r
    return out


@pytest.fixture
def two_sets(client: TestClient, keys: Keys) -> None:
    """site-a.r<kind> take rows, site-a.k<kind> columns: the same configurations."""
    for kind, (body, _) in KINDS.items():
        create(client, keys["admin"], f"site-a.r{kind}", body)
        create(client, keys["admin"], f"site-a.k{kind}", body)


# --------------------------------------------------------------------------------------
# the same samples as rows and as columns
# --------------------------------------------------------------------------------------

def test_columns_learn_as_rows_do_and_as_the_core_does(client: TestClient, keys: Keys, two_sets: None) -> None:
    """One batch holds a channel of two inputs and channels of one (x one list a sample):
    answers, stored rows, weights and versions agree with rows and with the core."""
    dev = keys["device"]
    rows = mixed_batch(40, seed=11, prefix="site-a.r")
    wild = [i for i, s in enumerate(rows) if s["channel"] == "site-a.rone"][35]
    rows[wild] = {**rows[wild], "y": rows[wild]["y"] + 1e6}  # an outlier past the warm-up: held back
    direct = {k: direct_model(f"site-a.k{k}", body) for k, (body, _) in KINDS.items()}
    held: list[dict[str, Any]] = []
    for part in (rows[:1], rows[1:70], rows[70:]):
        by_rows = gateway(client, {"source": "gw-3", "samples": part}, dev)
        by_cols = gateway(client, as_columns(renamed(part, "site-a.r", "site-a.k"), source="gw-3"), dev)
        assert unprefixed(by_cols, "site-a.k") == unprefixed(by_rows, "site-a.r")
        assert by_cols["residuals"] == core_residuals(part, "site-a.r", direct)
        held += by_cols["rejected"]
    assert [(r["channel"], r["reason"]) for r in held] == [("site-a.kone", "outlier")]
    for k in KINDS:
        assert stored_state(client, f"site-a.k{k}") == stored_state(client, f"site-a.r{k}") == direct[k].to_state()
        assert np.array_equal(np.array(stored_state(client, f"site-a.k{k}")["weights"]),
                              np.array(direct[k].to_state()["weights"]))
        assert stored_rows(client, f"site-a.k{k}") == stored_rows(client, f"site-a.r{k}")
        assert by_cols["channels"][f"site-a.k{k}"]["version"] == 40
        assert by_cols["channels"][f"site-a.k{k}"]["n_samples"] == 40


def test_x_as_one_number_a_sample_when_every_channel_has_one_input(client: TestClient, keys: Keys,
                                                                   two_sets: None) -> None:
    rows = mixed_batch(25, seed=21, prefix="site-a.r", kinds=("one", "rls"))
    by_rows = gateway(client, {"samples": rows}, keys["device"])
    by_cols = gateway(client, as_columns(renamed(rows, "site-a.r", "site-a.k"), x_rows=False), keys["device"])
    assert unprefixed(by_cols, "site-a.k") == unprefixed(by_rows, "site-a.r")
    for k in ("one", "rls"):
        assert stored_rows(client, f"site-a.k{k}") == stored_rows(client, f"site-a.r{k}")
        assert stored_state(client, f"site-a.k{k}") == stored_state(client, f"site-a.r{k}")


def test_a_columnar_retry_learns_nothing_twice(client: TestClient, keys: Keys, two_sets: None) -> None:
    dev = keys["device"]
    rows = mixed_batch(6, seed=31, prefix="site-a.k")
    body = as_columns(rows, source="gw-3")
    first = gateway(client, body, dev)
    assert (first["accepted"], first["duplicates"]) == (18, 0)
    before = store_fingerprint(client)
    again = gateway(client, body, dev)
    assert (again["accepted"], again["duplicates"], again["rejected"]) == (0, 18, [])
    assert again["residuals"] == [None] * 18
    assert again["channels"] == first["channels"]
    summary = gateway(client, {**body, "answer": "summary"}, dev)
    assert (summary["accepted"], summary["duplicates"], summary["rejected"]) == (0, 18, {})
    assert summary["residuals"] == {"count": 0, "mean": None, "sd": None, "max_abs": None}
    assert store_fingerprint(client) == before
    # half old, half new: only the new ones are learned, as rows would
    new = [{**s, "seq": 100 + i} for i, s in enumerate(mixed_batch(2, seed=32, prefix="site-a.k")[:4])]
    half = gateway(client, as_columns(rows[-3:] + new, source="gw-3"), dev)
    assert (half["accepted"] + len(half["rejected"]), half["duplicates"]) == (4, 3)
    assert [r is None for r in half["residuals"]] == [True] * 3 + [False] * 4


def test_the_summary_answer(client: TestClient, keys: Keys, two_sets: None) -> None:
    """count, mean, s.d. (n - 1) and max |r| over every channel's stored samples, as numpy
    gives them from the full answer's residuals; held-back samples counted by reason; each
    channel's version, n_samples and drift as the full answer gives them."""
    dev = keys["device"]
    rows = mixed_batch(50, seed=41, prefix="site-a.r")
    ones = [i for i, s in enumerate(rows) if s["channel"] == "site-a.rone"]
    rows[ones[40]] = {**rows[ones[40]], "y": 1e6}  # an outlier
    rows[ones[45]] = {**rows[ones[45]], "x": 9.9e37}  # a meter's overload code: out of range, residual not finite
    full = gateway(client, as_columns(rows, answer="full"), dev)
    summary = gateway(client, as_columns(renamed(rows, "site-a.r", "site-a.k"), answer="summary"), dev)
    direct = {k: direct_model(f"site-a.k{k}", body) for k, (body, _) in KINDS.items()}
    assert full["residuals"] == core_residuals(rows, "site-a.r", direct)
    r = np.array([v for v in full["residuals"] if v is not None])
    assert r.size == summary["residuals"]["count"]
    assert r.size >= 140  # the overload code's residual is not finite, nor the first of an empty curve
    assert summary["residuals"]["mean"] == pytest.approx(np.mean(r), rel=1e-12)
    assert summary["residuals"]["sd"] == pytest.approx(np.std(r, ddof=1), rel=1e-12)
    assert summary["residuals"]["max_abs"] == pytest.approx(np.max(np.abs(r)), rel=1e-12)
    assert summary["rejected"] == {"outlier": 1, "out_of_range": 1}
    assert sorted(x["reason"] for x in full["rejected"]) == ["out_of_range", "outlier"]
    assert (summary["accepted"], summary["duplicates"]) == (full["accepted"], full["duplicates"]) == (148, 0)
    assert unprefixed(summary["channels"], "site-a.k") == unprefixed(full["channels"], "site-a.r")
    assert set(summary) == {"accepted", "duplicates", "rejected", "residuals", "channels"}
    one = gateway(client, {"columns": {"channel": ["site-a.kone"], "x": [1.0], "y": [2.0]}, "answer": "summary"},
                  dev)
    assert one["residuals"]["count"] == 1 and one["residuals"]["sd"] is None


# --------------------------------------------------------------------------------------
# refused bodies: 4xx, the contract's error body, nothing stored
# --------------------------------------------------------------------------------------

CH = ["site-a.kone", "site-a.ktwo", "site-a.kone", "site-a.ktwo", "site-a.kone"]
GOOD: dict[str, Any] = {"channel": CH, "x": [[1.0], [1.0, 2.0], [2.0], [3.0, 4.0], [3.0]],
                        "y": [2.0, 3.0, 4.0, 5.0, 6.0], "seq": [1, 2, 3, 4, 5],
                        "t": ["2026-12-01T10:00:00Z"] * 5}


def _bad(column: str, index: int, value: Any) -> dict[str, Any]:
    cols = json.loads(json.dumps(GOOD))
    cols[column][index] = value
    return {"source": "gw-3", "columns": cols}


#: (name, body, status, code, details, or the first error's loc)
REFUSED: list[tuple[str, Any, int, str, Any]] = [
    ("channel shorter than y", {"columns": {**GOOD, "channel": CH[:4]}}, 422, "invalid_request",
     {"index": 4, "field": "channel"}),
    ("seq longer than y", {"columns": {**GOOD, "seq": [1, 2, 3, 4, 5, 6]}}, 422, "invalid_request",
     {"index": 5, "field": "seq"}),
    ("channel missing", {"columns": {k: v for k, v in GOOD.items() if k != "channel"}}, 422, "validation_error",
     ["body", "columns", "channel"]),
    ("channel not a list", {"columns": {**GOOD, "channel": "site-a.kone"}}, 422, "validation_error",
     ["body", "columns", "channel"]),
    ("a bad channel id", _bad("channel", 3, "Site-A.KTWO"), 422, "validation_error",
     ["body", "columns", "channel", "3"]),
    ("a channel not a string", _bad("channel", 2, 7), 422, "validation_error", ["body", "columns", "channel", "2"]),
    # a bad value in the second sample of site-a.ktwo's group: named by its index in the request
    ("y a string in one channel's group", _bad("y", 3, "5"), 422, "validation_error", ["body", "columns", "y", "3"]),
    ("x text in one channel's group", _bad("x", 3, [3.0, "a"]), 422, "validation_error",
     ["body", "columns", "x", "3", "1"]),
    ("x beyond 1e38 in one channel's group", _bad("x", 4, [1e39]), 422, "validation_error",
     ["body", "columns", "x", "4", "0"]),
    ("seq negative in one channel's group", _bad("seq", 3, -1), 422, "validation_error",
     ["body", "columns", "seq", "3"]),
    ("t without a zone in one channel's group", _bad("t", 3, "2026-12-01T10:00:00"), 422, "validation_error",
     ["body", "columns", "t", "3"]),
    ("t ahead of the clock", _bad("t", 3, "2999-01-01T00:00:00Z"), 422, "invalid_request", {"index": 3, "field": "t"}),
    ("x of another width within one channel's group", _bad("x", 3, [3.0]), 422, "invalid_request",
     {"index": 3, "field": "x"}),
    ("x numbers and lists mixed", _bad("x", 2, 2.0), 422, "validation_error", ["body", "columns", "x", "2"]),
    ("x of the wrong width for its channel", {"columns": {**GOOD, "x": [[1.0, 0.0], [1.0, 2.0], [2.0, 0.0],
                                                                        [3.0, 4.0], [3.0, 0.0]]}},
     422, "invalid_request", {"index": 0, "channel": "site-a.kone"}),
    ("one number a sample for a channel of two inputs", {"columns": {**GOOD, "x": [1.0, 2.0, 3.0, 4.0, 5.0]}},
     422, "invalid_request", {"index": 1, "channel": "site-a.ktwo"}),
    ("an unknown column", {"columns": {**GOOD, "u": [1] * 5}}, 422, "validation_error", ["body", "columns", "u"]),
    ("an unknown answer", {"columns": GOOD, "answer": "brief"}, 422, "validation_error", ["body", "answer"]),
    ("an unknown channel", _bad("channel", 3, "site-a.none"), 404, "channel_not_found",
     {"index": 3, "channel": "site-a.none"}),
    ("a channel of another prefix", _bad("channel", 1, "site-b.kone"), 403, "forbidden", None),
    ("an unknown reference", {"columns": GOOD, "reference": "no-such-reference"}, 404, "reference_not_found", None),
]


def test_refused_bodies_store_nothing(client: TestClient, keys: Keys, two_sets: None) -> None:
    create(client, keys["admin"], "site-b.kone", LINEAR)
    cases = Cases()
    for name, body, status, code, expect in REFUSED:
        with cases.case(name):
            before = store_fingerprint(client)
            err = assert_error(client.post(GATEWAY, json=body, headers=keys["device"]), status, code)
            if isinstance(expect, dict):
                assert err["details"] == expect, err
            elif expect is not None:
                assert err["details"][0]["loc"] == expect, err
            assert store_fingerprint(client) == before
    cases.done()
    # and the good body is learned, from a clean state
    out = gateway(client, {"source": "gw-3", "columns": GOOD}, keys["device"])
    assert (out["accepted"], out["duplicates"]) == (5, 0)


def test_a_bad_value_is_refused_as_the_row_body_refuses_it(client: TestClient, keys: Keys, two_sets: None) -> None:
    cases = Cases()
    for column, value in [("y", "5"), ("y", True), ("seq", 2**64), ("t", "yesterday"), ("x", [3.0, None])]:
        with cases.case(f"{column} {value!r}"):
            body = _bad(column, 3, value)
            before = store_fingerprint(client)
            err = assert_error(client.post(GATEWAY, json=body, headers=keys["device"]), 422, "validation_error")
            cols = body["columns"]
            rows = {"source": "gw-3", "samples": [{k: cols[k][i] for k in cols} for i in range(5)]}
            row_err = assert_error(client.post(GATEWAY, json=rows, headers=keys["device"]), 422, "validation_error")
            assert store_fingerprint(client) == before
            assert err["details"][0]["loc"][:4] == ["body", "columns", column, "3"], err
            assert row_err["details"][0]["loc"][:4] == ["body", "samples", "3", column], row_err
            assert err["details"][0]["type"] == row_err["details"][0]["type"]
            assert err["details"][0]["msg"] == row_err["details"][0]["msg"]
    cases.done()


def test_an_archived_channel_refuses_the_whole_batch(client: TestClient, keys: Keys, two_sets: None) -> None:
    r = client.post("/v1/channels/site-a.ktwo/archive", json={}, headers=keys["admin"])
    assert r.status_code == 200, r.text
    before = store_fingerprint(client)
    err = assert_error(client.post(GATEWAY, json={"columns": GOOD}, headers=keys["device"]), 409, "archived")
    assert err["details"]["index"] == 1 and err["details"]["channel"] == "site-a.ktwo"
    assert store_fingerprint(client) == before


def test_a_channel_requiring_a_reference_names_the_sample_in_the_request(client: TestClient, keys: Keys,
                                                                         two_sets: None) -> None:
    create(client, keys["admin"], "site-a.req", {**LINEAR, "require_reference": True})
    body = {"columns": {"channel": ["site-a.kone", "site-a.kone", "site-a.req"], "x": [1.0, 2.0, 3.0],
                        "y": [2.0, 4.0, 6.0]}}
    before = store_fingerprint(client)
    err = assert_error(client.post(GATEWAY, json=body, headers=keys["device"]), 422, "reference_required")
    assert err["details"] == {"index": 2, "channel": "site-a.req"}
    assert store_fingerprint(client) == before


def test_more_samples_than_the_batch_allows_are_413(client: TestClient, keys: Keys, two_sets: None) -> None:
    before = store_fingerprint(client)
    n = 10_001
    text = json.dumps({"columns": {"channel": ["site-a.kone"] * n, "x": [1.5] * n, "y": [3.0] * n}})
    err = assert_error(send_text(client, GATEWAY, text, keys["device"]), 413, "payload_too_large")
    assert err["details"] == {"max_batch": 10_000}
    # one long column is enough: counted before anything is read
    text = json.dumps({"columns": {"channel": ["site-a.kone"] * n, "x": [1.5], "y": [3.0]}})
    assert_error(send_text(client, GATEWAY, text, keys["device"]), 413, "payload_too_large")
    assert store_fingerprint(client) == before
    half = 5_000
    ok = json.dumps({"columns": {"channel": ["site-a.kone", "site-a.ktwo"] * half,
                                 "x": [[1.5], [1.5, 2.0]] * half, "y": [3.0, 3.5] * half}, "answer": "summary"})
    out = send_text(client, GATEWAY, ok, keys["device"])
    assert out.status_code == 200, out.text
    assert out.json()["accepted"] + sum(out.json()["rejected"].values()) == 10_000
    assert {k: v["n_samples"] for k, v in out.json()["channels"].items()} == {"site-a.kone": half,
                                                                              "site-a.ktwo": half}
    # a large full answer (rendered off the loop): one residual a sample, as the summary counts them
    full = send_text(client, GATEWAY, ok.replace('"summary"', '"full"'), keys["device"])
    assert full.status_code == 200, full.text
    assert full.headers["content-type"] == "application/json"
    r = np.array([v for v in full.json()["residuals"] if v is not None])
    assert len(full.json()["residuals"]) == 10_000 and r.size > 9_000
    assert full.json()["channels"]["site-a.ktwo"] == {**full.json()["channels"]["site-a.ktwo"], "n_samples": 2 * half,
                                                      "version": 2 * half}
