"""The OpenAPI document describes every /v1 answer with its fields, and the hot paths'
answers (ingest, gateway batch, predict) carry exactly the fields their actions give."""

from __future__ import annotations

from typing import Any

from curvekeeper.actions import curves, samples
from curvekeeper.actions.samples import SampleIn
from curvekeeper.api.schemas.curves import PredictAnswer, Quality
from curvekeeper.api.schemas.samples import (
    ChannelIngest,
    ColumnarAnswer,
    ColumnarSummary,
    DriftBrief,
    GatewayAnswer,
    IngestAnswer,
    ResidualSummary,
    SampleRejection,
)
from curvekeeper.api.schemas.samples_columns import answer_of
from fastapi.testclient import TestClient


def free_form(spec: dict[str, Any], schema: dict[str, Any]) -> bool:
    """An object schema that names no field: no ``properties`` and no ``$ref`` to a schema with them."""
    if "$ref" in schema:
        name = schema["$ref"].rsplit("/", 1)[-1]
        return free_form(spec, spec["components"]["schemas"][name])
    if "anyOf" in schema:  # one of several answers (e.g. by the body's form): each names its fields
        return any(free_form(spec, s) for s in schema["anyOf"])
    return "properties" not in schema


def untyped_answers(spec: dict[str, Any]) -> set[str]:
    out = set()
    for path, ops in spec["paths"].items():
        if not path.startswith("/v1/"):
            continue
        for method, op in ops.items():
            for status, answer in op["responses"].items():
                if not status.startswith("2"):
                    continue
                content = answer.get("content", {})
                if "application/json" not in content and content and all(
                        c.get("schema", {}).get("format") == "binary" for c in content.values()):
                    continue  # a document (the calibration report's PDF), declared as binary
                schema = content.get("application/json", {}).get("schema")
                if schema is None or free_form(spec, schema):
                    out.add(f"{method.upper()} {path}")
    return out


def test_every_v1_answer_names_its_fields(client: TestClient) -> None:
    spec = client.get("/openapi.json").json()
    found = untyped_answers(spec)
    assert not found, f"2xx answers without a schema of named fields: {sorted(found)}"


def test_the_walk_sees_a_free_form_answer() -> None:
    ok = {"properties": {"a": {"type": "integer"}}, "type": "object"}
    spec = {"components": {"schemas": {"A": ok, "B": {"type": "object", "additionalProperties": True}}},
            "paths": {"/v1/a": {"get": {"responses": {"200": {"content": {"application/json": {
                                    "schema": {"$ref": "#/components/schemas/A"}}}}}},
                                "post": {"responses": {"201": {"content": {"application/json": {
                                    "schema": {"$ref": "#/components/schemas/B"}}}}}}},
                      "/v1/b": {"delete": {"responses": {"200": {"content": {"application/json": {
                          "schema": {"type": "object"}}}}, "422": {}}}},
                      "/v1/c": {"get": {"responses": {"204": {"description": "no body"}}}},
                      "/v1/d": {"get": {"responses": {"200": {"content": {"application/json": {
                          "schema": {"anyOf": [{"$ref": "#/components/schemas/A"}, {"type": "object"}]}}}}}}},
                      "/v1/e": {"get": {"responses": {"200": {"content": {"application/json": {
                          "schema": {"anyOf": [{"$ref": "#/components/schemas/A"}, ok]}}}}}}},
                      "/healthz": {"get": {"responses": {"200": {"content": {"application/json": {
                          "schema": {"type": "object"}}}}}}}}}
    assert untyped_answers(spec) == {"POST /v1/a", "DELETE /v1/b", "GET /v1/c", "GET /v1/d"}


def fields(model: Any) -> set[str]:
    return set(model.model_fields)


def test_hot_answers_hold_every_field_the_actions_give(client: TestClient, make_channel: Any) -> None:
    """Predict's answer is built with model_construct, which drops an undeclared field
    silently; the ingest answers are validated, which would refuse one with a 500. Either
    way, pin the fields here."""
    make_channel("site-a.p1")
    make_channel("site-a.p2")
    work = client.app.state.ctx.work  # type: ignore[attr-defined]
    with work.unit(write=True) as unit:
        # past the warm-up, a wild reference is held back: the answer then lists a rejection
        learn = [SampleIn(x=float(i % 10), y=2.0 * (i % 10) + 1) for i in range(40)]
        one = samples.ingest(unit, "site-a.p1", [*learn, SampleIn(x=2.0, y=1e9)], None, None)
        batch = samples.ingest_gateway(unit, [("site-a.p1", SampleIn(x=1.0, y=2.0)),
                                              ("site-a.p2", SampleIn(x=3.0, y=4.0))], "gw", None)
        predicted = curves.predict(unit, "site-a.p1", [1.0, 2.0], None)
    assert set(answer_of(one, None).model_dump()) == fields(IngestAnswer)
    assert set(answer_of(one, "full").model_dump()) == fields(ColumnarAnswer)
    assert set(answer_of(one, "summary").model_dump()) == fields(ColumnarSummary)
    assert set(one.drift) == fields(DriftBrief)
    assert set(one.quality) == fields(Quality)
    assert set(one.residual_summary()) == fields(ResidualSummary)
    assert one.rejected_counts() == {"outlier": 1}
    assert set(batch) - {"alarms"} == fields(GatewayAnswer)
    for c in batch["channels"].values():
        assert set(c) == fields(ChannelIngest)
    assert set(predicted) == fields(PredictAnswer)
    assert one.rejected
    for r in one.rejected:
        assert set(r) == fields(SampleRejection)
