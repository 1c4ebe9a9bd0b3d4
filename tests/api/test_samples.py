"""Sample routes: ``POST /v1/channels/{id}/samples``, ``POST /v1/samples`` (gateway) and
``GET /v1/channels/{id}/samples``.

Grouped per route; in each group the unauthorised cases come first, then bad input,
then success. Every failed request must leave the store exactly as it was
(``store_fingerprint``), and the next good request must behave as if the failed one
had never been sent. Learning is checked against ``curvekeeper.core.ChannelModel`` fed the
same samples directly: same residuals and same stored state, bit for bit.
"""

from __future__ import annotations

import copy
import csv
import io
import json
import math
from collections.abc import Iterator
from datetime import datetime
from typing import Any

import httpx
import numpy as np
import pytest
from curvekeeper.api import create_app
from curvekeeper.channel_config import channel_config
from curvekeeper.config import Settings
from curvekeeper.core import ChannelModel
from curvekeeper.store.tables import Channel, Sample, Snapshot
from fastapi.testclient import TestClient
from sqlalchemy import select

from tests.api.helpers import CODES_422, Cases, Headers, Keys, assert_error, stored_state
from tests.conftest import LINEAR, store_fingerprint


def model_of(body: dict[str, Any]) -> ChannelModel:
    """A fresh model for a channel body, validated as the service validates it."""
    return ChannelModel.from_config(channel_config(body))


CHANNELS = "/v1/channels"
GATEWAY = "/v1/samples"

TWO_INPUTS: dict[str, Any] = {
    "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0},
               {"name": "temp", "unit": "degC", "min": -20.0, "max": 60.0}],
    "output": {"name": "pressure", "unit": "kPa"},
    "basis": {"kind": "poly", "degree": 2},
}

THERMISTOR: dict[str, Any] = {  # the contract's example channel
    "inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000}],
    "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
    "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
    "learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.2}},
    "drift": {"detector": "page_hinkley", "tolerance": 0.3},
    "outlier_sd": 6.0,
    "snapshot_every": 1000,
}


# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------

def send_text(client: TestClient, url: str, text: str, headers: Headers) -> httpx.Response:
    """POST the given text as a JSON body (for NaN, Infinity, 1e400, broken JSON)."""
    r: httpx.Response = client.post(url, content=text.encode(),
                                    headers={**headers, "Content-Type": "application/json"})
    return r




def in_control(n: int, seed: int, offset: float = 0.0) -> list[dict[str, Any]]:
    """n samples of y = 2 x + offset + noise (s.d. 0.5), x uniform over [0, 100]."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 100.0, n)
    y = 2.0 * x + offset + rng.normal(0.0, 0.5, n)
    return [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]


def two_input_samples(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    raw = rng.uniform(0.0, 100.0, n)
    temp = rng.uniform(-20.0, 60.0, n)
    y = 1.5 * raw + 0.2 * temp - 0.001 * raw * temp + rng.normal(0.0, 0.1, n)
    return [{"x": [float(a), float(b)], "y": float(c)} for a, b, c in zip(raw, temp, y, strict=True)]


def thermistor_samples(n: int, seed: int) -> list[dict[str, Any]]:
    """Steinhart-Hart (A, B, C of a common 10 kohm NTC), readings in degC."""
    rng = np.random.default_rng(seed)
    r = rng.uniform(1000.0, 40000.0, n)
    ln = np.log(r)
    t = 1.0 / (1.129148e-3 + 2.34125e-4 * ln + 8.76741e-8 * ln**3) - 273.15
    t = t + rng.normal(0.0, 0.01, n)
    return [{"x": float(a), "y": float(b)} for a, b in zip(r, t, strict=True)]


def xy(samples: list[dict[str, Any]]) -> tuple[list[list[float]], list[float]]:
    """Samples as the core takes them: X (n, d) and y (n,)."""
    X = [s["x"] if isinstance(s["x"], list) else [s["x"]] for s in samples]
    return X, [s["y"] for s in samples]


def direct_model(channel_id: str, body: dict[str, Any]) -> ChannelModel:
    """The core's model for the channel body the test posted."""
    return model_of({"id": channel_id, **copy.deepcopy(body)})


def json_residuals(res: Any) -> list[float | None]:
    """The core's residuals as the API answers them (NaN, where the curve cannot be
    inverted, as null)."""
    return [float(v) if math.isfinite(v) else None for v in res.residuals.tolist()]


def create(client: TestClient, headers: Headers, channel_id: str, body: dict[str, Any]) -> None:
    r = client.post(CHANNELS, json={"id": channel_id, **body}, headers=headers)
    assert r.status_code == 201, r.text


def post(client: TestClient, channel_id: str, body: dict[str, Any], headers: Headers) -> dict[str, Any]:
    r = client.post(f"{CHANNELS}/{channel_id}/samples", json=body, headers=headers)
    assert r.status_code == 200, r.text
    out: dict[str, Any] = r.json()
    return out


def _read(client: TestClient, stmt: Any) -> list[Any]:
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        return list(repo.session.execute(stmt).all())




def stored_snapshots(client: TestClient, channel_id: str) -> list[tuple[str, int, int, dict[str, Any]]]:
    """(reason, version, n_samples, model_state) of the channel's snapshots, oldest first."""
    rows = _read(client, select(Snapshot.reason, Snapshot.version, Snapshot.n_samples, Snapshot.model_state)
                 .join(Channel, Channel.pk == Snapshot.channel_pk).where(Channel.id == channel_id)
                 .order_by(Snapshot.pk))
    return [(r[0], r[1], r[2], r[3]) for r in rows]


def stored_samples(client: TestClient, channel_id: str) -> list[Any]:
    return _read(client, select(Sample.seq, Sample.x, Sample.y, Sample.source, Sample.source_seq,
                                Sample.accepted, Sample.reason, Sample.residual)
                 .join(Channel, Channel.pk == Sample.channel_pk).where(Channel.id == channel_id)
                 .order_by(Sample.seq))


def events(client: TestClient, channel_id: str, headers: Headers, kind: str | None = None) -> list[Any]:
    url = f"{CHANNELS}/{channel_id}/events?limit=1000" + (f"&kind={kind}" if kind else "")
    r = client.get(url, headers=headers)
    assert r.status_code == 200, r.text
    items: list[Any] = r.json()["items"]
    return items


def compact_batch(n: int, channel: str | None = None) -> str:
    """A JSON body of n samples, built as text (fast for 10,000+)."""
    item = '{"x":1.5,"y":3.0}' if channel is None else '{"channel":"' + channel + '","x":1.5,"y":3.0}'
    return '{"samples":[' + ",".join([item] * n) + "]}"




@pytest.fixture
def channel(make_channel: Any) -> str:
    """One LINEAR channel inside the device key's prefix."""
    make_channel("site-a.p1")
    return "site-a.p1"


def _headers(keys: Keys, who: str | None) -> Headers:
    if who is None:
        return {}
    if who == "bad":
        return {"Authorization": "Bearer ck_not-a-real-key"}
    return keys[who]


#: the codes of a 422: refused by the request schema, or by the rules below it (input
#: counts, the cursor); which of the two does it is not part of the contract

UNAUTHORISED = [(None, 401, "unauthorized"), ("bad", 401, "unauthorized"), ("revoked", 401, "unauthorized")]


# --------------------------------------------------------------------------------------
# POST /v1/channels/{id}/samples
# --------------------------------------------------------------------------------------

def test_post_without_a_valid_key_or_prefix_is_refused(client: TestClient, keys: Keys, channel: str) -> None:
    cases = Cases()
    for who, status, code in [*UNAUTHORISED, ("other_device", 403, "forbidden")]:
        with cases.case(str(who)):
            before = store_fingerprint(client)
            r = client.post(f"{CHANNELS}/{channel}/samples", json={"samples": [{"x": 1.0, "y": 2.0}]},
                            headers=_headers(keys, who))
            assert_error(r, status, code)
            assert store_fingerprint(client) == before
    cases.done()


def test_post_without_a_key_is_401_whatever_the_body(client: TestClient, keys: Keys, channel: str) -> None:
    before = store_fingerprint(client)
    url = f"{CHANNELS}/{channel}/samples"
    assert_error(send_text(client, url, '{"samples": [', {}), 401, "unauthorized")
    assert_error(send_text(client, url, '{"samples": []}', {}), 401, "unauthorized")
    assert store_fingerprint(client) == before


def test_post_with_a_matching_device_key_or_a_higher_role(client: TestClient, keys: Keys, channel: str) -> None:
    for n, who in enumerate(["device", "technician", "admin"], start=1):
        out = post(client, channel, {"samples": [{"x": 1.0, "y": 2.0}]}, keys[who])
        assert out["accepted"] == 1 and out["n_samples"] == n


def test_post_malformed_json_is_400(client: TestClient, keys: Keys, channel: str) -> None:
    cases = Cases()
    for text in ['{"samples": [', '{"samples": [{"x": 1, "y": 2},]}', "samples=1", "{'samples': []}"]:
        with cases.case(text):
            before = store_fingerprint(client)
            assert_error(send_text(client, f"{CHANNELS}/{channel}/samples", text, keys["device"]), 400,
                         "malformed_json")
            assert store_fingerprint(client) == before
    cases.done()


WRONG_TYPES = [
    # t is ISO-8601 text, as the document says: a number is not taken as Unix time
    ("t a number", {"samples": [{"x": 1.0, "y": 2.0, "t": 0}]}),
    ("t a float", {"samples": [{"x": 1.0, "y": 2.0, "t": 1764583200.5}]}),
    ("x text", {"samples": [{"x": "abc", "y": 2.0}]}),
    ("y null", {"samples": [{"x": 1.0, "y": None}]}),
    ("x missing", {"samples": [{"y": 2.0}]}),
    ("y missing", {"samples": [{"x": 1.0}]}),
    ("x object", {"samples": [{"x": {"raw": 1.0}, "y": 2.0}]}),
    ("samples object", {"samples": {"x": 1.0, "y": 2.0}}),
    ("sample a number", {"samples": [3.0]}),
    ("body a list", [{"x": 1.0, "y": 2.0}]),
    ("seq negative", {"source": "gw-1", "samples": [{"x": 1.0, "y": 2.0, "seq": -1}]}),
    ("seq fraction", {"source": "gw-1", "samples": [{"x": 1.0, "y": 2.0, "seq": 1.5}]}),
    ("seq text", {"source": "gw-1", "samples": [{"x": 1.0, "y": 2.0, "seq": "one"}]}),
    ("source empty", {"source": "", "samples": [{"x": 1.0, "y": 2.0, "seq": 1}]}),
    ("source a number", {"source": 3, "samples": [{"x": 1.0, "y": 2.0, "seq": 1}]}),
    ("t not a time", {"samples": [{"x": 1.0, "y": 2.0, "t": "yesterday"}]}),
    ("t without zone", {"samples": [{"x": 1.0, "y": 2.0, "t": "2026-12-01T10:00:00"}]}),
    ("unknown field", {"samples": [{"x": 1.0, "y": 2.0, "unit": "mV"}]}),
    ("unknown top field", {"samples": [{"x": 1.0, "y": 2.0}], "channel": "site-a.p1"}),
    ("samples missing", {"source": "gw-1"}),
]


def test_post_wrong_types_are_422(client: TestClient, keys: Keys, channel: str) -> None:
    cases = Cases()
    for name, body in WRONG_TYPES:
        with cases.case(name):
            before = store_fingerprint(client)
            r = client.post(f"{CHANNELS}/{channel}/samples", json=body, headers=keys["device"])
            assert_error(r, 422, "validation_error")
            assert store_fingerprint(client) == before
    cases.done()


def test_post_booleans_and_numeric_strings_are_not_numbers(client: TestClient, keys: Keys, channel: str) -> None:
    """JSON true/false or "1.5" where a number belongs is a wrong type (the core's config
    rules refuse them too), not a reading of 1.0 / 0.0 / 1.5."""
    cases = Cases()
    for name, sample in [("x true", {"x": True, "y": 2.0}), ("y false", {"x": 1.0, "y": False}),
                         ("x [true]", {"x": [True], "y": 2.0}), ("x text number", {"x": "1.5", "y": 2.0}),
                         ("x list of text", {"x": ["1"], "y": 2.0}), ("y text number", {"x": 1.0, "y": "2"}),
                         ("seq true", {"x": 1.0, "y": 2.0, "seq": True})]:
        with cases.case(name):
            before = store_fingerprint(client)
            r = client.post(f"{CHANNELS}/{channel}/samples", json={"source": "gw-1", "samples": [sample]},
                            headers=keys["device"])
            assert_error(r, 422, "validation_error")
            assert store_fingerprint(client) == before
    cases.done()


NON_FINITE = [
    ("x NaN", '{"samples":[{"x": NaN, "y": 1}]}'),
    ("y NaN", '{"samples":[{"x": 1, "y": NaN}]}'),
    ("x Infinity", '{"samples":[{"x": Infinity, "y": 1}]}'),
    ("y -Infinity", '{"samples":[{"x": 1, "y": -Infinity}]}'),
    ("x [NaN]", '{"samples":[{"x": [NaN], "y": 1}]}'),
    ("x 1e300", '{"samples":[{"x": 1e300, "y": 1}]}'),
    ("y 1e300", '{"samples":[{"x": 1, "y": 1e300}]}'),
    ("x -1e300", '{"samples":[{"x": -1e300, "y": 1}]}'),
    ("x 1e400", '{"samples":[{"x": 1e400, "y": 1}]}'),
    ("y -1e400", '{"samples":[{"x": 1, "y": -1e400}]}'),
    ("third y NaN", '{"samples":[{"x": 1, "y": 2}, {"x": 2, "y": 4}, {"x": 3, "y": NaN}]}'),
]


def test_post_non_finite_or_huge_numbers_are_422(client: TestClient, keys: Keys, channel: str) -> None:
    """NaN, Infinity, 1e300 and 1e400 sent as raw JSON text."""
    cases = Cases()
    for name, text in NON_FINITE:
        with cases.case(name):
            before = store_fingerprint(client)
            assert_error(send_text(client, f"{CHANNELS}/{channel}/samples", text, keys["device"]), 422,
                         "validation_error")
            assert store_fingerprint(client) == before
    cases.done()


def test_post_wrong_number_of_inputs_is_422(client: TestClient, keys: Keys) -> None:
    create(client, keys["admin"], "site-a.one", LINEAR)
    create(client, keys["admin"], "site-a.two", TWO_INPUTS)
    cases = Cases()
    for cid, x in [("site-a.one", [1.0, 2.0]), ("site-a.one", []), ("site-a.two", 1.0), ("site-a.two", [1.0]),
                   ("site-a.two", [1.0, 2.0, 3.0])]:
        with cases.case(f"{cid} x={x}"):
            before = store_fingerprint(client)
            r = client.post(f"{CHANNELS}/{cid}/samples", json={"samples": [{"x": x, "y": 2.0}]},
                            headers=keys["device"])
            assert r.status_code == 422, r.text
            assert r.json()["error"]["code"] in CODES_422
            assert "x" in r.json()["error"]["message"]
            assert store_fingerprint(client) == before
    cases.done()


def test_post_an_empty_batch_is_422(client: TestClient, keys: Keys, channel: str) -> None:
    before = store_fingerprint(client)
    r = client.post(f"{CHANNELS}/{channel}/samples", json={"source": "gw-1", "samples": []},
                    headers=keys["device"])
    err = assert_error(r, 422, "validation_error")
    assert "samples" in err["message"]
    assert store_fingerprint(client) == before


def test_post_to_an_unknown_channel_is_404(client: TestClient, keys: Keys, channel: str) -> None:
    before = store_fingerprint(client)
    r = client.post(f"{CHANNELS}/site-a.nope/samples", json={"samples": [{"x": 1.0, "y": 2.0}]},
                    headers=keys["device"])
    err = assert_error(r, 404, "channel_not_found")
    assert "site-a.nope" in err["message"]
    assert store_fingerprint(client) == before


def test_post_to_an_invalid_channel_id_is_422(client: TestClient, keys: Keys, channel: str) -> None:
    before = store_fingerprint(client)
    r = client.post(f"{CHANNELS}/Site-A.P1/samples", json={"samples": [{"x": 1.0, "y": 2.0}]},
                    headers=keys["admin"])
    assert_error(r, 422, "validation_error")
    assert store_fingerprint(client) == before


def test_post_more_than_10000_samples_is_413(client: TestClient, keys: Keys, channel: str) -> None:
    before = store_fingerprint(client)
    r = send_text(client, f"{CHANNELS}/{channel}/samples", compact_batch(10_001), keys["device"])
    err = assert_error(r, 413, "payload_too_large")
    assert "10000" in err["message"].replace(",", "")
    assert store_fingerprint(client) == before


def test_post_exactly_10000_samples_is_accepted(client: TestClient, keys: Keys, channel: str) -> None:
    r = send_text(client, f"{CHANNELS}/{channel}/samples", compact_batch(10_000), keys["device"])
    assert r.status_code == 200, r.text
    assert r.json()["n_samples"] == 10_000


@pytest.fixture
def small_client(settings: Settings) -> Iterator[TestClient]:
    """An app whose request bodies may be at most 1,000 bytes."""
    with TestClient(create_app(settings.with_(max_body_bytes=1000))) as c:
        yield c


def test_post_a_body_over_the_size_limit_is_413(small_client: TestClient, admin: Headers) -> None:
    create(small_client, admin, "site-a.p1", LINEAR)
    before = store_fingerprint(small_client)
    body = json.dumps({"samples": in_control(40, seed=1)})
    assert len(body) > 1000
    err = assert_error(send_text(small_client, f"{CHANNELS}/site-a.p1/samples", body, admin), 413,
                       "payload_too_large")
    assert "1000" in err["message"]
    assert store_fingerprint(small_client) == before
    # just under the limit is fine
    ok = json.dumps({"samples": in_control(10, seed=1)})
    assert len(ok) < 1000
    assert send_text(small_client, f"{CHANNELS}/site-a.p1/samples", ok, admin).status_code == 200


def test_post_a_streamed_body_over_the_size_limit_is_413(small_client: TestClient, admin: Headers) -> None:
    """Without a Content-Length (chunked transfer) the limit must hold as well."""
    create(small_client, admin, "site-a.p1", LINEAR)
    before = store_fingerprint(small_client)
    body = json.dumps({"samples": in_control(40, seed=1)}).encode()

    def chunks() -> Iterator[bytes]:
        for i in range(0, len(body), 200):
            yield body[i:i + 200]

    r = small_client.post(f"{CHANNELS}/site-a.p1/samples", content=chunks(),
                          headers={**admin, "Content-Type": "application/json"})
    assert_error(r, 413, "payload_too_large")
    assert store_fingerprint(small_client) == before


def test_post_a_bad_fifth_sample_stores_nothing_of_the_batch(client: TestClient, keys: Keys,
                                                             make_channel: Any) -> None:
    # snapshot_every 2: the good samples before the bad one would make snapshots
    make_channel("site-a.p1", snapshot_every=2)
    good = in_control(6, seed=2)
    for i, s in enumerate(good):
        s["seq"] = i + 1
    batch = [*good[:4], {"x": [1.0, 2.0], "y": 2.0, "seq": 5}, *good[5:]]  # one input, two values
    before = store_fingerprint(client)
    r = client.post(f"{CHANNELS}/site-a.p1/samples", json={"source": "gw-1", "samples": batch},
                    headers=keys["device"])
    err = assert_error(r, 422, "invalid_request")
    assert err["details"]["index"] == 4
    assert store_fingerprint(client) == before
    # the (source, seq) pairs of the failed batch were not used up, and nothing was learned
    fixed = [*good[:4], {**good[4], "seq": 5}, *good[5:]]
    out = post(client, "site-a.p1", {"source": "gw-1", "samples": fixed}, keys["device"])
    assert out["accepted"] == 6 and out["duplicates"] == 0
    direct = direct_model("site-a.p1", {**LINEAR, "snapshot_every": 2})
    res = direct.learn(*xy(fixed))
    assert out["residuals"] == json_residuals(res)
    assert stored_state(client, "site-a.p1") == direct.to_state()


CONFIGS = {
    "linear sgd": (LINEAR, in_control),
    "linear rls": ({**LINEAR, "learner": {"kind": "rls", "forgetting": 0.995}}, in_control),
    "sgd inverse_time huber l2 cusum": ({**LINEAR, "learner": {
        "kind": "sgd", "schedule": {"kind": "inverse_time", "eta0": 0.5}, "huber": 3.0, "l2": 0.001},
        "drift": {"detector": "cusum"}}, in_control),
    "two inputs poly 2": (TWO_INPUTS, two_input_samples),
    "thermistor": (THERMISTOR, thermistor_samples),
}


def test_post_learns_in_order_like_the_core(client: TestClient, keys: Keys) -> None:
    """Per sample, in order, as the core learns: residuals and stored state bit for bit,
    whatever the batches (one sample, 49, 70) and for each kind of channel."""
    cases = Cases()
    for k, (name, (body, make)) in enumerate(CONFIGS.items()):
        with cases.case(name):
            cid = f"site-a.c{k}"
            create(client, keys["admin"], cid, body)
            samples = make(120, 31)
            direct = direct_model(cid, body)
            n = 0
            for part in (samples[:1], samples[1:50], samples[50:]):
                out = post(client, cid, {"samples": part}, keys["device"])
                res = direct.learn(*xy(part))
                n += len(part)
                assert out["residuals"] == json_residuals(res)
                assert out["accepted"] == res.accepted
                assert out["duplicates"] == 0
                assert out["version"] == n and out["n_samples"] == n
                assert out["drift"]["state"] == direct.summary()["drift"]["state"]
                assert out["drift"]["statistic"] == direct.summary()["drift"]["statistic"]
                assert stored_state(client, cid) == direct.to_state()
            # and the order matters: the same samples reversed give another curve
            other = direct_model(cid, body)
            other.learn(*xy(samples[::-1]))
            assert other.to_state()["weights"] != direct.to_state()["weights"]
            rows = stored_samples(client, cid)
            assert [r.seq for r in rows] == list(range(1, 121))
            assert [r.y for r in rows] == [s["y"] for s in samples]
    cases.done()


def test_post_answers_the_design_fields(client: TestClient, keys: Keys, channel: str) -> None:
    out = post(client, channel, {"source": "gw-3", "samples": [
        {"x": 10.5, "y": 21.0, "t": "2026-12-01T10:00:00Z", "seq": 17}]}, keys["device"])
    assert {"accepted", "duplicates", "rejected", "residuals", "version", "n_samples", "drift"} <= set(out)
    assert out["accepted"] == 1 and out["duplicates"] == 0 and out["rejected"] == []
    assert out["residuals"] == [21.0]  # a new curve is zero everywhere
    assert out["version"] == 1 and out["n_samples"] == 1
    assert out["drift"]["state"] == "ok" and isinstance(out["drift"]["statistic"], float)
    ch = client.get(f"{CHANNELS}/{channel}", headers=keys["technician"]).json()
    assert datetime.fromisoformat(ch["last_sample_at"]) == datetime.fromisoformat("2026-12-01T10:00:00+00:00")


def test_post_source_and_seq_make_retries_idempotent(client: TestClient, keys: Keys, channel: str) -> None:
    s = in_control(6, seed=41)
    dev = keys["device"]
    url = f"{CHANNELS}/{channel}/samples"
    # a repeat inside one request: the first one counts
    first = post(client, channel, {"source": "gw-3", "samples": [
        {**s[0], "seq": 1}, {**s[1], "seq": 2}, {**s[2], "seq": 1}]}, dev)
    assert first["accepted"] == 2 and first["duplicates"] == 1
    assert first["residuals"][2] is None
    assert first["version"] == 2 and first["n_samples"] == 2
    # a repeat in a later request
    second_body = {"source": "gw-3", "samples": [{**s[1], "seq": 2}, {**s[3], "seq": 3}]}
    second = post(client, channel, second_body, dev)
    assert second["accepted"] == 1 and second["duplicates"] == 1
    assert second["residuals"][0] is None and second["residuals"][1] is not None
    assert second["version"] == 3 and second["n_samples"] == 3
    # learned: exactly the first occurrences, in order
    direct = direct_model(channel, LINEAR)
    res = direct.learn(*xy([s[0], s[1], s[3]]))
    assert first["residuals"][:2] + second["residuals"][1:] == json_residuals(res)
    assert stored_state(client, channel) == direct.to_state()
    # a full retry changes nothing at all
    before = store_fingerprint(client)
    again = client.post(url, json=second_body, headers=dev)
    assert again.status_code == 200, again.text
    assert again.json()["accepted"] == 0 and again.json()["duplicates"] == 2
    assert again.json()["residuals"] == [None, None]
    assert again.json()["version"] == 3 and again.json()["n_samples"] == 3
    assert store_fingerprint(client) == before
    # the same seq from another source is another sample
    other = post(client, channel, {"source": "gw-4", "samples": [{**s[4], "seq": 1}]}, dev)
    assert other["accepted"] == 1 and other["duplicates"] == 0
    rows = stored_samples(client, channel)
    assert [(r.source, r.source_seq, r.y) for r in rows] == [
        ("gw-3", 1, s[0]["y"]), ("gw-3", 2, s[1]["y"]), ("gw-3", 3, s[3]["y"]), ("gw-4", 1, s[4]["y"])]


def test_post_without_source_and_seq_is_never_deduplicated(client: TestClient, keys: Keys,
                                                           make_channel: Any) -> None:
    bodies: list[tuple[str, dict[str, Any]]] = [
        ("neither", {"samples": [{"x": 1.0, "y": 2.0}]}),
        ("seq without source", {"samples": [{"x": 1.0, "y": 2.0, "seq": 7}]}),
        ("source without seq", {"source": "gw-3", "samples": [{"x": 1.0, "y": 2.0}]})]
    cases = Cases()
    for k, (name, body) in enumerate(bodies):
        with cases.case(name):
            cid = f"site-a.n{k}"
            make_channel(cid)
            twice = {**body, "samples": body["samples"] * 2}
            a = post(client, cid, twice, keys["device"])
            b = post(client, cid, body, keys["device"])
            assert a["accepted"] == 2 and a["duplicates"] == 0
            assert b["accepted"] == 1 and b["duplicates"] == 0
            assert b["n_samples"] == 3 and b["version"] == 3
            assert len(stored_samples(client, cid)) == 3
    cases.done()


def test_post_stores_outliers_as_rejected(client: TestClient, keys: Keys, channel: str) -> None:
    warm = in_control(200, seed=51)
    post(client, channel, {"source": "gw-1", "samples": [{**s, "seq": i} for i, s in enumerate(warm, 1)]},
         keys["device"])
    wild = {"x": 40.0, "y": 80.0 + 1000.0}
    batch = [in_control(1, seed=52)[0], wild, in_control(1, seed=53)[0]]
    # a retried sample first: the indexes in the answer are the request's
    sent = [{**warm[-1], "seq": 200}, *[{**s, "seq": 201 + i} for i, s in enumerate(batch)]]
    out = post(client, channel, {"source": "gw-1", "samples": sent}, keys["device"])
    assert out["accepted"] == 2 and out["duplicates"] == 1
    assert out["rejected"] == [{"index": 2, "reason": "outlier"}]
    assert out["n_samples"] == 203 and out["version"] == 203
    direct = direct_model(channel, LINEAR)
    direct.learn(*xy(warm))
    res = direct.learn(*xy(batch))
    assert res.status == ["accepted", "outlier", "accepted"]
    assert out["residuals"] == [None, *json_residuals(res)]
    assert out["residuals"][2] == pytest.approx(1000.0, abs=5.0)  # the prior residual is answered
    assert stored_state(client, channel) == direct.to_state()
    row = stored_samples(client, channel)[201]
    assert (row.seq, row.y, row.accepted, row.reason) == (202, wild["y"], False, "outlier")
    assert row.residual == out["residuals"][2]
    ch = client.get(f"{CHANNELS}/{channel}", headers=keys["technician"]).json()
    assert ch["n_samples"] == 203 and ch["n_rejected"] == 1


def test_post_with_the_gate_off_learns_outliers(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1", outlier_sd=None)
    post(client, "site-a.p1", {"samples": in_control(200, seed=51)}, keys["device"])
    out = post(client, "site-a.p1", {"samples": [{"x": 40.0, "y": 1080.0}]}, keys["device"])
    assert out["accepted"] == 1 and out["rejected"] == []


def test_post_takes_periodic_snapshots(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel("site-a.p1", snapshot_every=50)
    samples = in_control(120, seed=61)
    out = post(client, "site-a.p1", {"samples": samples}, keys["device"])
    assert out["n_samples"] == 120 and out["version"] == 120
    direct = direct_model("site-a.p1", {**LINEAR, "snapshot_every": 50})
    direct.learn(*xy(samples[:50]))
    at_50 = direct.to_state()
    direct.learn(*xy(samples[50:100]))
    at_100 = direct.to_state()
    direct.learn(*xy(samples[100:]))
    assert direct.summary()["drift"]["state"] == "ok"  # no drift-alarm snapshot in this stream
    snaps = stored_snapshots(client, "site-a.p1")
    assert [(r, v, n) for r, v, n, _ in snaps] == [("periodic", 50, 50), ("periodic", 100, 100)]
    assert snaps[0][3] == at_50
    assert snaps[1][3] == at_100
    assert stored_state(client, "site-a.p1") == direct.to_state()
    listed = client.get(f"{CHANNELS}/site-a.p1/snapshots", headers=keys["technician"]).json()["items"]
    assert [(s["reason"], s["version"], s["n_samples"]) for s in listed] == [
        ("periodic", 50, 50), ("periodic", 100, 100)]
    # counting goes on across requests: the third falls at sample 150
    post(client, "site-a.p1", {"samples": in_control(30, seed=62)}, keys["device"])
    assert [n for _, _, n, _ in stored_snapshots(client, "site-a.p1")] == [50, 100, 150]


def test_post_a_drift_alarm_writes_events_and_a_snapshot(client: TestClient, keys: Keys, channel: str) -> None:
    warm = in_control(200, seed=11)
    a = post(client, channel, {"samples": warm}, keys["device"])
    assert a["drift"]["state"] == "ok"
    shifted = in_control(20, seed=12, offset=1000.0)
    b = post(client, channel, {"samples": shifted}, keys["device"])
    assert b["drift"]["state"] == "alarm"
    # gated samples are stored, not learned; the detector saw them all
    assert b["accepted"] == 0 and len(b["rejected"]) == 20
    assert {r["reason"] for r in b["rejected"]} == {"outlier"}
    assert b["n_samples"] == 220 and b["version"] == 220

    direct = direct_model(channel, LINEAR)
    direct.learn(*xy(warm))
    probe = ChannelModel.from_state(direct.config, direct.to_state())
    res = probe.learn(*xy(shifted))
    k = res.drift_state.index("alarm")  # the sample that raised the alarm
    assert b["residuals"] == json_residuals(res)
    assert stored_state(client, channel) == probe.to_state()

    alarms = events(client, channel, keys["technician"], "drift_alarm")
    assert len(alarms) == 1
    assert alarms[0]["details"]["sample_seq"] == 200 + k + 1
    assert alarms[0]["version"] == 200 + k + 1
    snaps = stored_snapshots(client, channel)
    assert [(r, v, n) for r, v, n, _ in snaps] == [("drift-alarm", 200 + k, 200 + k)]
    # the state just before the alarm, with the curve from the estimated change point: the
    # core's ``before_alarm`` for the same stream
    assert snaps[0][3] == res.before_alarm and snaps[0][3]["n_samples"] == 200 + k
    listed = client.get(f"{CHANNELS}/{channel}/snapshots", headers=keys["technician"]).json()["items"]
    assert [(x["reason"], x["n_samples"]) for x in listed] == [("drift-alarm", 200 + k)]
    snap_events = [e for e in events(client, channel, keys["technician"], "snapshot")
                   if e["details"].get("reason") == "drift-alarm"]
    assert [e["details"]["snapshot"] for e in snap_events] == [listed[0]["id"]]
    ch = client.get(f"{CHANNELS}/{channel}", headers=keys["technician"]).json()
    assert ch["drift"]["state"] == "alarm" and ch["n_rejected"] == 20


def test_post_a_drift_alarm_and_a_periodic_snapshot_in_one_request(client: TestClient, keys: Keys,
                                                                   make_channel: Any) -> None:
    """snapshot_every 210: the offset batch (samples 201-220) raises the alarm a few samples
    in and crosses the periodic cut at 210; both snapshots hold the core's state there."""
    make_channel("site-a.p1", snapshot_every=210)
    warm = in_control(200, seed=11)
    shifted = in_control(20, seed=12, offset=1000.0)
    post(client, "site-a.p1", {"samples": warm}, keys["device"])
    post(client, "site-a.p1", {"samples": shifted}, keys["device"])
    direct = direct_model("site-a.p1", {**LINEAR, "snapshot_every": 210})
    direct.learn(*xy(warm))
    probe = ChannelModel.from_state(direct.config, direct.to_state()).learn(*xy(shifted))
    k = probe.drift_state.index("alarm")
    assert k < 10
    at_alarm = probe.before_alarm  # the state before the alarm with the change point's curve
    direct.learn(*xy(shifted[:k]))
    direct.learn(*xy(shifted[k:10]))
    at_210 = direct.to_state()
    direct.learn(*xy(shifted[10:]))
    snaps = stored_snapshots(client, "site-a.p1")
    assert [(r, n) for r, _, n, _ in snaps] == [("drift-alarm", 200 + k), ("periodic", 210)]
    assert snaps[0][3] == at_alarm
    assert snaps[1][3] == at_210
    assert stored_state(client, "site-a.p1") == direct.to_state()


DEGREE_12 = {**LINEAR, "basis": {"kind": "poly", "degree": 12}}


def test_a_meters_overload_code_is_stored_out_of_range_and_learning_goes_on(
        client: TestClient, keys: Keys, settings: Settings) -> None:
    """9.9e37, the overload code SCPI instruments send for a reading past their range (from
    memory), raised to the 12th power overflows a double (numpy: inf):
    the sample is stored and held back as out_of_range, never learned, and the channel learns,
    answers and restarts as before."""
    with np.errstate(over="ignore"):
        assert math.isinf(np.float64(9.9e37) ** 12)  # what learning it would meet
    create(client, keys["admin"], "site-a.p12", DEGREE_12)
    url = f"{CHANNELS}/site-a.p12/samples"
    before, wild, after = in_control(40, seed=81), {"x": 9.9e37, "y": 5.0}, in_control(20, seed=82)
    post(client, "site-a.p12", {"samples": before}, keys["device"])
    out = post(client, "site-a.p12", {"samples": [wild, *after[:1]]}, keys["device"])
    assert out["rejected"] == [{"index": 0, "reason": "out_of_range"}]
    assert out["accepted"] == 1 and out["residuals"][0] is None
    later = post(client, "site-a.p12", {"samples": after[1:]}, keys["device"])
    assert later["accepted"] == len(after) - 1 and later["n_samples"] == 61
    # learnt as if the wild sample had not been there (the core, fed the others alone)
    direct = direct_model("site-a.p12", DEGREE_12)
    direct.learn(*xy(before + after))
    assert stored_state(client, "site-a.p12")["weights"] == direct.to_state()["weights"]
    # stored with its reason, in the JSON and the CSV export
    rows = client.get(url, params={"limit": 1000}, headers=keys["technician"]).json()["items"]
    assert [(r["x"], r["accepted"], r["reason"]) for r in rows if not r["accepted"]] == [
        ([9.9e37], False, "out_of_range")]
    text = client.get(url, params={"format": "csv", "limit": 1000}, headers=keys["technician"]).text
    held = [r for r in csv.DictReader(io.StringIO(text)) if r["accepted"] == "false"]
    assert [(float(r["x"]), r["reason"]) for r in held] == [(9.9e37, "out_of_range")]
    got = client.get(f"{CHANNELS}/site-a.p12", headers=keys["technician"])
    assert got.status_code == 200 and got.json()["n_rejected"] == 1 and got.json()["n_samples"] == 61
    # a fresh process on the same store decodes the stored state
    with TestClient(create_app(settings)) as fresh:
        again = fresh.get(f"{CHANNELS}/site-a.p12", headers=keys["technician"])
        assert again.status_code == 200, again.text
        assert again.json() == got.json()
        assert post(fresh, "site-a.p12", {"samples": in_control(3, seed=83)}, keys["device"])["accepted"] == 3


def test_post_a_failed_request_leaves_learning_untouched(client: TestClient, keys: Keys, channel: str) -> None:
    """After a refused batch the next one learns as if the refused one had never come."""
    a = in_control(40, seed=71)
    post(client, channel, {"samples": a}, keys["device"])
    bad = [*in_control(5, seed=72), {"x": [1.0, 2.0], "y": 1.0}]
    assert client.post(f"{CHANNELS}/{channel}/samples", json={"samples": bad},
                       headers=keys["device"]).status_code == 422
    b = in_control(10, seed=73)
    out = post(client, channel, {"samples": b}, keys["device"])
    direct = direct_model(channel, LINEAR)
    direct.learn(*xy(a))
    assert out["residuals"] == json_residuals(direct.learn(*xy(b)))
    assert out["version"] == 50
    assert stored_state(client, channel) == direct.to_state()


# --------------------------------------------------------------------------------------
# POST /v1/samples (gateway)
# --------------------------------------------------------------------------------------

@pytest.fixture
def gateway_channels(client: TestClient, keys: Keys) -> list[str]:
    create(client, keys["admin"], "site-a.g1", LINEAR)
    create(client, keys["admin"], "site-a.g2", TWO_INPUTS)
    create(client, keys["admin"], "site-b.g3", LINEAR)
    return ["site-a.g1", "site-a.g2", "site-b.g3"]


def test_gateway_without_a_valid_key_is_401(client: TestClient, keys: Keys, gateway_channels: list[str]) -> None:
    cases = Cases()
    for who, status, code in UNAUTHORISED:
        with cases.case(str(who)):
            before = store_fingerprint(client)
            r = client.post(GATEWAY, json={"samples": [{"channel": "site-a.g1", "x": 1.0, "y": 2.0}]},
                            headers=_headers(keys, who))
            assert_error(r, status, code)
            assert store_fingerprint(client) == before
    cases.done()


def test_gateway_a_sample_outside_the_device_prefixes_is_403(client: TestClient, keys: Keys,
                                                             gateway_channels: list[str]) -> None:
    before = store_fingerprint(client)
    body = {"samples": [{"channel": "site-a.g1", "x": 1.0, "y": 2.0},
                        {"channel": "site-b.g3", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.g1", "x": 2.0, "y": 4.0}]}
    err = assert_error(client.post(GATEWAY, json=body, headers=keys["device"]), 403, "forbidden")
    assert "site-b.g3" in err["message"]
    assert store_fingerprint(client) == before
    # the other device may post to its own prefix only
    ok = client.post(GATEWAY, json={"samples": [body["samples"][1]]}, headers=keys["other_device"])
    assert ok.status_code == 200, ok.text


GATEWAY_BAD = [
    ("empty", '{"samples": []}'),
    ("no channel", '{"samples": [{"x": 1, "y": 2}]}'),
    ("bad channel id", '{"samples": [{"channel": "Site-A.G1", "x": 1, "y": 2}]}'),
    ("x NaN", '{"samples": [{"channel": "site-a.g1", "x": NaN, "y": 2}]}'),
    ("y 1e400", '{"samples": [{"channel": "site-a.g1", "x": 1, "y": 1e400}]}'),
    ("y 1e300", '{"samples": [{"channel": "site-a.g1", "x": 1, "y": 1e300}]}'),
    ("second x text", '{"samples": [{"channel": "site-a.g1", "x": 1, "y": 2}, '
                      '{"channel": "site-a.g2", "x": [1, "a"], "y": 2}]}'),
]


def test_gateway_bad_input(client: TestClient, keys: Keys, gateway_channels: list[str]) -> None:
    cases = Cases()
    for text in ['{"samples": [', "[]]"]:
        with cases.case(text):
            before = store_fingerprint(client)
            assert_error(send_text(client, GATEWAY, text, keys["device"]), 400, "malformed_json")
            assert store_fingerprint(client) == before
    for name, text in GATEWAY_BAD:
        with cases.case(name):
            before = store_fingerprint(client)
            assert_error(send_text(client, GATEWAY, text, keys["device"]), 422, "validation_error")
            assert store_fingerprint(client) == before
    cases.done()


def test_gateway_a_bad_sample_for_one_channel_stores_nothing(client: TestClient, keys: Keys,
                                                             gateway_channels: list[str]) -> None:
    """site-a.g2 is learned after site-a.g1 (channels go in id order): g1's part must be
    rolled back too."""
    before = store_fingerprint(client)
    body: dict[str, Any] = {"source": "gw-1", "samples": [
        {"channel": "site-a.g1", "x": 1.0, "y": 2.0, "seq": 1},
        {"channel": "site-a.g2", "x": [1.0, 2.0], "y": 2.0, "seq": 2},
        {"channel": "site-a.g1", "x": 2.0, "y": 4.0, "seq": 3},
        {"channel": "site-a.g2", "x": 1.0, "y": 2.0, "seq": 4},  # needs two inputs
    ]}
    r = client.post(GATEWAY, json=body, headers=keys["device"])
    err = assert_error(r, 422, "invalid_request")
    assert err["details"]["index"] == 3 and err["details"]["channel"] == "site-a.g2"
    assert store_fingerprint(client) == before
    # nothing was learned and no (source, seq) was used up
    body["samples"][3]["x"] = [1.0, 3.0]
    out = client.post(GATEWAY, json=body, headers=keys["device"]).json()
    assert out["accepted"] == 4 and out["duplicates"] == 0
    direct = direct_model("site-a.g1", LINEAR)
    direct.learn([[1.0], [2.0]], [2.0, 4.0])
    assert stored_state(client, "site-a.g1") == direct.to_state()


def test_gateway_an_unknown_channel_stores_nothing(client: TestClient, keys: Keys,
                                                   gateway_channels: list[str]) -> None:
    before = store_fingerprint(client)
    body = {"samples": [{"channel": "site-a.g1", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.zz", "x": 1.0, "y": 2.0},
                        {"channel": "site-a.g2", "x": [1.0, 2.0], "y": 2.0}]}
    err = assert_error(client.post(GATEWAY, json=body, headers=keys["device"]), 404, "channel_not_found")
    assert "site-a.zz" in err["message"]
    assert store_fingerprint(client) == before
    # and the next good batch learns from a clean state
    post(client, "site-a.g1", {"samples": [{"x": 3.0, "y": 6.0}]}, keys["device"])
    direct = direct_model("site-a.g1", LINEAR)
    direct.learn([[3.0]], [6.0])
    assert stored_state(client, "site-a.g1") == direct.to_state()


def test_gateway_more_than_10000_samples_is_413(client: TestClient, keys: Keys,
                                                gateway_channels: list[str]) -> None:
    before = store_fingerprint(client)
    r = send_text(client, GATEWAY, compact_batch(10_001, "site-a.g1"), keys["device"])
    assert_error(r, 413, "payload_too_large")
    assert store_fingerprint(client) == before


def test_gateway_learns_each_channel_in_order(client: TestClient, keys: Keys,
                                              gateway_channels: list[str]) -> None:
    one = in_control(30, seed=81)
    two = two_input_samples(20, seed=82)
    rng = np.random.default_rng(83)
    # interleave the two channels at random, keeping each channel's own order
    order = rng.permutation(["site-a.g2"] * 20 + ["site-a.g1"] * 30)
    queues = {"site-a.g1": list(one), "site-a.g2": list(two)}
    batch = [{"channel": str(c), **queues[str(c)].pop(0)} for c in order]
    r = client.post(GATEWAY, json={"samples": batch}, headers=keys["device"])
    assert r.status_code == 200, r.text
    out = r.json()
    assert out["accepted"] == 50 and out["duplicates"] == 0 and out["rejected"] == []
    d1 = direct_model("site-a.g1", LINEAR)
    d2 = direct_model("site-a.g2", TWO_INPUTS)
    r1 = iter(json_residuals(d1.learn(*xy(one))))
    r2 = iter(json_residuals(d2.learn(*xy(two))))
    expected = [next(r1) if s["channel"] == "site-a.g1" else next(r2) for s in batch]
    assert out["residuals"] == expected  # one per sample, in request order
    assert stored_state(client, "site-a.g1") == d1.to_state()
    assert stored_state(client, "site-a.g2") == d2.to_state()
    assert out["channels"]["site-a.g1"]["n_samples"] == 30 and out["channels"]["site-a.g1"]["version"] == 30
    assert out["channels"]["site-a.g2"]["n_samples"] == 20 and out["channels"]["site-a.g2"]["version"] == 20
    assert [r.y for r in stored_samples(client, "site-a.g1")] == [s["y"] for s in one]
    assert [r.x for r in stored_samples(client, "site-a.g2")] == [s["x"] for s in two]
    assert stored_samples(client, "site-b.g3") == []


def test_gateway_duplicates_are_counted_not_stored(client: TestClient, keys: Keys,
                                                   gateway_channels: list[str]) -> None:
    s = in_control(4, seed=91)
    body = {"source": "gw-9", "samples": [
        {"channel": "site-a.g1", **s[0], "seq": 1},
        {"channel": "site-a.g2", "x": [1.0, 2.0], "y": 3.0, "seq": 2},
        {"channel": "site-a.g1", **s[1], "seq": 3},
        {"channel": "site-a.g1", **s[2], "seq": 1},  # a repeat inside the request
    ]}
    out = client.post(GATEWAY, json=body, headers=keys["device"]).json()
    assert out["accepted"] == 3 and out["duplicates"] == 1
    assert out["residuals"][3] is None
    before = store_fingerprint(client)
    retry = client.post(GATEWAY, json=body, headers=keys["device"])
    assert retry.status_code == 200, retry.text
    assert retry.json()["accepted"] == 0 and retry.json()["duplicates"] == 4
    assert retry.json()["residuals"] == [None] * 4
    assert store_fingerprint(client) == before
    direct = direct_model("site-a.g1", LINEAR)
    direct.learn(*xy(s[:2]))
    assert stored_state(client, "site-a.g1") == direct.to_state()


def test_gateway_rejected_indexes_are_request_indexes(client: TestClient, keys: Keys,
                                                      gateway_channels: list[str]) -> None:
    post(client, "site-a.g1", {"samples": in_control(200, seed=51)}, keys["device"])
    body = {"samples": [
        {"channel": "site-a.g2", "x": [1.0, 2.0], "y": 3.0},
        {"channel": "site-a.g1", "x": 40.0, "y": 1080.0},
        {"channel": "site-a.g1", "x": 40.0, "y": 80.0},
    ]}
    out = client.post(GATEWAY, json=body, headers=keys["device"]).json()
    assert out["rejected"] == [{"index": 1, "channel": "site-a.g1", "reason": "outlier"}]
    assert out["accepted"] == 2


# --------------------------------------------------------------------------------------
# GET /v1/channels/{id}/samples
# --------------------------------------------------------------------------------------

def test_export_needs_a_technician_key(client: TestClient, keys: Keys, channel: str) -> None:
    cases = Cases()
    for who, status, code in [*UNAUTHORISED, ("device", 403, "forbidden"), ("other_device", 403, "forbidden")]:
        for fmt in ("json", "csv"):
            with cases.case(f"{who} {fmt}"):
                r = client.get(f"{CHANNELS}/{channel}/samples?format={fmt}", headers=_headers(keys, who))
                assert_error(r, status, code)
    cases.done()


def test_export_bad_query_is_422(client: TestClient, keys: Keys, channel: str) -> None:
    cases = Cases()
    for query in ["format=xml", "format=CSV", "format=", "limit=0", "limit=1001", "cursor=zzz",
                  "cursor=djE6YWJj"]:  # base64 of "v1:abc"
        with cases.case(query):
            r = client.get(f"{CHANNELS}/{channel}/samples?{query}", headers=keys["technician"])
            assert r.status_code == 422, r.text
            assert r.json()["error"]["code"] in CODES_422
    cases.done()


def test_export_an_unknown_channel_is_404(client: TestClient, keys: Keys, channel: str) -> None:
    assert_error(client.get(f"{CHANNELS}/site-a.nope/samples", headers=keys["technician"]), 404,
                 "channel_not_found")


def _export_setup(client: TestClient, keys: Keys, channel: str) -> list[dict[str, Any]]:
    post(client, channel, {"samples": in_control(40, seed=101)}, keys["device"])
    sent: list[dict[str, Any]] = [
        {"x": 12.25, "y": 24.5, "t": "2026-12-01T10:00:00Z", "seq": 1},
        {"x": 0.1, "y": 1e-7, "t": "2026-12-01T12:00:00+02:00", "seq": 2},
        {"x": 40.0, "y": 1080.0, "seq": 3},  # an outlier
    ]
    post(client, channel, {"source": "gw-3", "samples": sent}, keys["device"])
    return sent


def test_export_json_pages_through_all_samples(client: TestClient, keys: Keys, channel: str) -> None:
    sent = _export_setup(client, keys, channel)
    items: list[dict[str, Any]] = []
    cursor: str | None = None
    pages = 0
    while True:
        url = f"{CHANNELS}/{channel}/samples?limit=2" + (f"&cursor={cursor}" if cursor else "")
        r = client.get(url, headers=keys["technician"])
        assert r.status_code == 200, r.text
        assert set(r.json()) == {"items", "next_cursor"}
        assert len(r.json()["items"]) <= 2
        items.extend(r.json()["items"])
        cursor = r.json()["next_cursor"]
        pages += 1
        if cursor is None:
            break
    assert pages == 22
    assert [it["seq"] for it in items] == list(range(1, 44))
    last = items[-3:]
    assert [it["x"] for it in last] == [[s["x"]] for s in sent]
    assert [it["y"] for it in last] == [s["y"] for s in sent]
    assert [it["source"] for it in last] == ["gw-3"] * 3
    assert [it["source_seq"] for it in last] == [1, 2, 3]
    assert [datetime.fromisoformat(it["t"]) for it in last[:2]] == [
        datetime.fromisoformat("2026-12-01T10:00:00+00:00"), datetime.fromisoformat("2026-12-01T10:00:00+00:00")]
    assert [it["accepted"] for it in last] == [True, True, False]
    assert [it["reason"] for it in last] == [None, None, "outlier"]
    assert all(isinstance(it["residual"], float) for it in items)
    assert items[0]["source"] is None and items[0]["source_seq"] is None


def test_export_default_limit_is_100(client: TestClient, keys: Keys, channel: str) -> None:
    post(client, channel, {"samples": in_control(150, seed=102)}, keys["device"])
    page = client.get(f"{CHANNELS}/{channel}/samples", headers=keys["technician"]).json()
    assert len(page["items"]) == 100 and page["next_cursor"] is not None
    rest = client.get(f"{CHANNELS}/{channel}/samples?cursor={page['next_cursor']}",
                      headers=keys["technician"]).json()
    assert [it["seq"] for it in rest["items"]] == list(range(101, 151)) and rest["next_cursor"] is None


def test_export_csv(client: TestClient, keys: Keys, channel: str) -> None:
    _export_setup(client, keys, channel)
    r = client.get(f"{CHANNELS}/{channel}/samples?format=csv&limit=1000", headers=keys["technician"])
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/csv")
    rows = list(csv.reader(io.StringIO(r.text)))
    header, body = rows[0], rows[1:]
    assert header[:1] == ["seq"] and {"t", "x", "y", "residual", "accepted", "source", "source_seq"} <= set(header)
    assert len(body) == 43
    as_json = client.get(f"{CHANNELS}/{channel}/samples?limit=1000", headers=keys["technician"]).json()["items"]
    for row, it in zip(body, as_json, strict=True):
        rec = dict(zip(header, row, strict=True))
        assert int(rec["seq"]) == it["seq"]
        assert float(rec["x"]) == it["x"][0]
        assert float(rec["y"]) == it["y"]
        assert float(rec["residual"]) == it["residual"]
        assert rec["accepted"] == ("true" if it["accepted"] else "false")
        assert rec["source"] == (it["source"] or "")
        assert rec["source_seq"] == ("" if it["source_seq"] is None else str(it["source_seq"]))
        assert datetime.fromisoformat(rec["t"]) == datetime.fromisoformat(it["t"])
    assert [r[header.index("reason")] for r in body[-3:]] == ["", "", "outlier"]


def test_export_csv_with_two_inputs(client: TestClient, keys: Keys) -> None:
    create(client, keys["admin"], "site-a.p2", TWO_INPUTS)
    sent = two_input_samples(3, seed=111)
    post(client, "site-a.p2", {"samples": sent}, keys["device"])
    r = client.get(f"{CHANNELS}/site-a.p2/samples?format=csv", headers=keys["technician"])
    assert r.status_code == 200, r.text
    rows = list(csv.DictReader(io.StringIO(r.text)))
    assert len(rows) == 3
    for rec, s in zip(rows, sent, strict=True):
        assert [float(v) for v in rec["x"].split(";")] == s["x"]
        assert float(rec["y"]) == s["y"]


def test_export_csv_pages(client: TestClient, keys: Keys, channel: str) -> None:
    post(client, channel, {"samples": in_control(5, seed=121)}, keys["device"])
    r = client.get(f"{CHANNELS}/{channel}/samples?format=csv&limit=2", headers=keys["technician"])
    assert r.status_code == 200, r.text
    assert [row["seq"] for row in csv.DictReader(io.StringIO(r.text))] == ["1", "2"]
    cursor = r.headers.get("x-next-cursor")
    assert cursor
    r2 = client.get(f"{CHANNELS}/{channel}/samples?format=csv&limit=2&cursor={cursor}",
                    headers=keys["technician"])
    assert [row["seq"] for row in csv.DictReader(io.StringIO(r2.text))] == ["3", "4"]


def test_each_stored_sample_keeps_the_drift_statistic_after_it(client: TestClient, admin: dict[str, str],
                                                               make_channel: Any) -> None:

    make_channel("site-a.stat")
    rng = np.random.default_rng(5)
    x = rng.uniform(0, 100, 80)
    y = 2 * x + 1 + rng.normal(0, 0.1, 80)
    y[60:] += 1.0  # a lasting step: the statistic climbs
    r = client.post("/v1/channels/site-a.stat/samples", headers=admin,
                    json={"samples": [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]})
    assert r.status_code == 200
    stored = client.get("/v1/channels/site-a.stat/samples?limit=1000", headers=admin).json()["items"]
    model = model_of({"id": "site-a.stat", **LINEAR})
    expected = model.learn(x, y).drift_statistic.tolist()
    assert [s["drift_statistic"] for s in stored] == expected
