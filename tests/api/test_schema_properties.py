"""Hypothesis on the channel and sample bodies: whatever JSON arrives, the answer is a
2xx or a 4xx with the contract's error body, never a 5xx; a refused sample batch stores
nothing."""

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.conftest import store_fingerprint

numbers = st.one_of(st.integers(-10**20, 10**20), st.floats(allow_nan=False, allow_infinity=False),
                    st.sampled_from([0, -0.0, 1e308, -1e308, 5e-324]))
scalars = st.one_of(st.none(), st.booleans(), numbers, st.text(max_size=12))
json_values = st.recursive(scalars, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                             st.dictionaries(st.text(max_size=8), inner, max_size=4)),
                           max_leaves=12)

KINDS = ["poly", "rbf", "log_poly", "hinge", "x"]
sample = st.fixed_dictionaries({"x": st.one_of(numbers, st.lists(numbers, max_size=3), json_values),
                                "y": st.one_of(numbers, json_values)},
                               optional={"t": st.one_of(st.text(max_size=30), st.datetimes().map(str)),
                                         "seq": st.one_of(st.integers(-5, 2**64), json_values)})
channel_body = st.fixed_dictionaries(
    {"id": st.one_of(st.from_regex(r"site-a\.[a-z0-9]{1,8}", fullmatch=True), st.text(max_size=10))},
    optional={"inputs": st.one_of(st.lists(st.fixed_dictionaries(
                  {"min": numbers, "max": numbers, "unit": st.sampled_from(["mV", "", " "])},
                  optional={"name": st.text(max_size=5)}), max_size=3), json_values),
              "basis": st.one_of(st.fixed_dictionaries({"kind": st.sampled_from(KINDS)},
                                                       optional={"degree": numbers, "powers": json_values,
                                                                 "knots": json_values, "centers": json_values,
                                                                 "width": numbers}), json_values),
              "learner": json_values, "drift": json_values,
              "output": st.one_of(st.fixed_dictionaries({"unit": st.sampled_from(["degC", ""])}), json_values),
              "outlier_sd": json_values, "snapshot_every": json_values})


def error_body_ok(r: Any) -> None:
    assert r.status_code < 500, r.text
    if r.status_code >= 400:
        err = r.json()["error"]
        assert isinstance(err["code"], str) and err["code"] and isinstance(err["message"], str)


@settings(max_examples=60, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(body=channel_body)
def test_any_channel_body_gets_a_clean_answer(client: TestClient, admin: dict[str, str], body: dict[str, Any]) -> None:
    error_body_ok(client.post("/v1/channels", json=body, headers=admin))


@settings(max_examples=60, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(samples=st.lists(sample, min_size=0, max_size=5), source=st.one_of(st.none(), st.text(max_size=5)))
def test_any_samples_body_gets_a_clean_answer_and_a_refusal_stores_nothing(
        client: TestClient, admin: dict[str, str], make_channel: Any, samples: list[Any], source: Any) -> None:
    if client.get("/v1/channels/site-a.h1", headers=admin).status_code == 404:
        make_channel("site-a.h1")
    body: dict[str, Any] = {"samples": samples}
    if source is not None:
        body["source"] = source
    before = store_fingerprint(client)
    r = client.post("/v1/channels/site-a.h1/samples", json=body, headers=admin)
    error_body_ok(r)
    if r.status_code >= 400:
        assert store_fingerprint(client) == before
