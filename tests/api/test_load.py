"""Oversized bodies are refused by item count before validation, and large ones are
validated in a worker thread, never on the event loop.

An oversized body whose last item is also invalid tells the order apart: a count checked
first answers 413 (payload_too_large); a count checked after validation answers 422.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from typing import Any

import pytest
from curvekeeper.api import deps
from curvekeeper.api.routes.curves import MAX_POINTS
from fastapi.testclient import TestClient

from tests.api.helpers import Keys, expect_error

Make = Callable[..., dict[str, Any]]
SAMPLES = "/v1/channels/site-a.p1/samples"


def _oversized(n: int, item: Any, bad: Any) -> list[Any]:
    return [item] * (n - 1) + [bad]


def test_too_many_samples_are_refused_before_validation(client: TestClient, keys: Keys, make_channel: Make,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    make_channel()
    validated: list[Any] = []
    monkeypatch.setattr(deps, "validate_body", lambda raw, model: validated.append(model))
    n = client.app.state.ctx.settings.max_batch + 1  # type: ignore[attr-defined]
    body = {"samples": _oversized(n, {"x": 1.0, "y": 2.0}, {"x": 1.0, "y": "not a number"})}
    err = expect_error(client, "POST", SAMPLES, 413, "payload_too_large", json=body, headers=keys["device"])
    assert err["details"] == {"max_batch": n - 1}
    expect_error(client, "POST", "/v1/samples", 413, "payload_too_large", headers=keys["device"],
                 json={"samples": _oversized(n, {"channel": "site-a.p1", "x": 1.0, "y": 2.0}, {"channel": 7})})
    assert validated == []  # no model was built for either body


def test_too_many_predict_values_are_refused_before_validation(client: TestClient, keys: Keys,
                                                               make_channel: Make) -> None:
    make_channel()
    n = client.app.state.ctx.settings.max_predict + 1  # type: ignore[attr-defined]
    err = expect_error(client, "POST", "/v1/channels/site-a.p1/predict", 413, "payload_too_large",
                       json={"x": _oversized(n, 1.0, "bad")}, headers=keys["device"])
    assert err["details"] == {"max_predict": n - 1}


def test_too_many_calibration_points_are_refused_before_validation(client: TestClient, keys: Keys,
                                                                   make_channel: Make) -> None:
    make_channel()
    points = _oversized(MAX_POINTS + 1, {"x": 1.0, "y": 2.0}, {"x": 1.0})
    expect_error(client, "POST", "/v1/channels/site-a.p1/calibrate", 413, "payload_too_large",
                 json={"points": points}, headers=keys["technician"])


def test_a_large_body_is_validated_in_a_worker_thread(client: TestClient, keys: Keys, make_channel: Make,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    make_channel()
    on_loop: dict[int, bool] = {}
    real = deps.validate_body

    def spy(raw: Any, model: Any) -> Any:
        try:
            asyncio.get_running_loop()
            on_loop[deps.count_items(raw, "samples")] = True
        except RuntimeError:  # no loop runs in this thread: a worker thread
            on_loop[deps.count_items(raw, "samples")] = False
        return real(raw, model)

    monkeypatch.setattr(deps, "validate_body", spy)
    big = deps.INLINE_MAX_BODY_ITEMS + 1
    for n in (1, big):
        r = client.post(SAMPLES, json={"samples": [{"x": float(i), "y": 2.0 * i} for i in range(n)]},
                        headers=keys["device"])
        assert r.status_code == 200, r.text[:300]
    assert on_loop == {1: True, big: False}


def test_a_bad_item_in_an_allowed_body_names_its_field(client: TestClient, keys: Keys, make_channel: Make) -> None:
    make_channel()
    n = deps.INLINE_MAX_BODY_ITEMS + 5  # validated in a worker thread: the same 422 as on the loop
    body = {"samples": _oversized(n, {"x": 1.0, "y": 2.0}, {"x": 1.0, "y": "bad"})}
    err = expect_error(client, "POST", SAMPLES, 422, "validation_error", json=body, headers=keys["device"])
    assert any(d["loc"] == ["body", "samples", str(n - 1), "y"] for d in err["details"]), err
