"""One MQTT message learned as the HTTP route learns the same body (no broker needed):
for each payload, the same status and the same answer or error body; a refused payload
leaves the store unchanged; a store that is busy leaves the message unacknowledged."""

from __future__ import annotations

import json
from typing import Any

import pytest
from curvekeeper.errors import StoreBusy
from curvekeeper.mqtt import ingest_message
from fastapi.testclient import TestClient

from tests.conftest import store_fingerprint

REFUSED: list[bytes] = [
    b"{not json", b"\xff\xfe", b"[1, 2]", b'{"samples": []}', b'{"samples": "none"}',
    b'{"samples": [{"x": 1, "y": 2}], "extra": 1}', b'{"samples": [{"x": "hot", "y": 2}]}',
    b'{"samples": [{"x": [1, 2], "y": 2}]}', b'{"samples": [{"x": 1, "y": 2, "t": "2999-01-01T00:00:00Z"}]}',
    b'{"samples": [{"x": 1, "y": 2, "reference": "no-such-reference"}]}',
    # the columnar body
    b'{"columns": {"x": [1, 2], "y": [2]}}', b'{"columns": {"x": [1, "hot"], "y": [2, 3]}}',
    b'{"columns": {"x": [1, 2], "y": [2, NaN]}}', b'{"columns": {"x": [[1, 2]], "y": [2]}}',
    b'{"columns": {"x": [1], "y": [2], "t": ["2999-01-01T00:00:00Z"]}}',
    b'{"columns": {"x": [1], "y": [2]}, "answer": "x"}',
    b'{"columns": {"x": [1], "y": [2], "seq": [-1]}, "source": "dev-1"}', b'{"columns": {"y": [2]}}',
]


def mqtt(client: TestClient, channel: str, payload: bytes) -> Any:
    ctx = client.app.state.ctx  # type: ignore[attr-defined]
    return ingest_message(ctx.work, ctx.settings, ctx.metrics, channel, payload)


@pytest.mark.parametrize("payload", REFUSED)
def test_a_refused_payload_gets_the_http_error_body_and_stores_nothing(client: TestClient, admin: dict[str, str],
                                                                        make_channel: Any, payload: bytes) -> None:
    make_channel("site-a.p1")
    http = client.post("/v1/channels/site-a.p1/samples", content=payload,
                       headers={**admin, "Content-Type": "application/json"})
    assert 400 <= http.status_code < 500
    before = store_fingerprint(client)
    reply = mqtt(client, "site-a.p1", payload)
    assert (reply.status, reply.body, reply.ack) == (http.status_code, http.json(), True)
    assert store_fingerprint(client) == before


def test_unknown_and_archived_channels_are_refused_as_http_refuses_them(client: TestClient, admin: dict[str, str],
                                                                         make_channel: Any) -> None:
    make_channel("site-a.gone")
    assert client.post("/v1/channels/site-a.gone/archive", json={}, headers=admin).status_code == 200
    body = json.dumps({"samples": [{"x": 1.0, "y": 3.0}]}).encode()
    for channel in ("site-a.none", "site-a.gone"):
        http = client.post(f"/v1/channels/{channel}/samples", content=body,
                           headers={**admin, "Content-Type": "application/json"})
        before = store_fingerprint(client)
        reply = mqtt(client, channel, body)
        assert (reply.status, reply.body, reply.ack) == (http.status_code, http.json(), True)
        assert reply.status in (404, 409)
        assert store_fingerprint(client) == before


def test_samples_are_learned_once_with_the_http_answer(client: TestClient, admin: dict[str, str],
                                                       make_channel: Any) -> None:
    make_channel("site-a.p1")
    make_channel("site-a.p2")
    body = {"source": "dev-1", "samples": [{"x": float(i), "y": 2.0 * i + 1.0, "seq": i} for i in range(1, 6)]}
    http = client.post("/v1/channels/site-a.p1/samples", json=body, headers=admin)
    reply = mqtt(client, "site-a.p2", json.dumps(body).encode())
    assert (reply.status, reply.ack) == (200, True)
    assert reply.body == http.json()  # two channels of one configuration learn alike
    again = mqtt(client, "site-a.p2", json.dumps(body).encode())  # the broker delivering it again
    assert (again.body["accepted"], again.body["duplicates"], again.body["n_samples"]) == (0, 5, 5)
    assert client.get("/v1/channels/site-a.p2", headers=admin).json()["n_samples"] == 5


@pytest.mark.parametrize("answer", ["full", "summary"])
def test_columns_are_learned_once_with_the_http_answer(client: TestClient, admin: dict[str, str],
                                                       make_channel: Any, answer: str) -> None:
    make_channel("site-a.p1")
    make_channel("site-a.p2")
    body = {"source": "dev-1", "answer": answer,
            "columns": {"x": [float(i) for i in range(1, 6)], "y": [2.0 * i + 1.0 for i in range(1, 6)],
                        "seq": list(range(1, 6))}}
    http = client.post("/v1/channels/site-a.p1/samples", json=body, headers=admin)
    reply = mqtt(client, "site-a.p2", json.dumps(body).encode())
    assert (reply.status, reply.ack) == (200, True)
    assert reply.body == http.json()
    assert "quality" in reply.body
    again = mqtt(client, "site-a.p2", json.dumps(body).encode())
    assert (again.body["accepted"], again.body["duplicates"], again.body["n_samples"]) == (0, 5, 5)
    assert client.get("/v1/channels/site-a.p2", headers=admin).json()["n_samples"] == 5


def test_a_busy_store_leaves_the_message_unacknowledged(client: TestClient, make_channel: Any,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    make_channel("site-a.p1")
    ctx = client.app.state.ctx  # type: ignore[attr-defined]

    def busy(*_: Any, **__: Any) -> Any:
        raise StoreBusy("the store is busy or unavailable; retry shortly", details={"reason": "locked"})

    monkeypatch.setattr(ctx.work, "unit", busy)
    before = store_fingerprint(client)
    reply = mqtt(client, "site-a.p1", b'{"samples": [{"x": 1, "y": 3}]}')
    assert (reply.status, reply.ack, reply.body["error"]["code"]) == (503, False, "store_busy")
    assert store_fingerprint(client) == before


@pytest.mark.parametrize("columnar", [False, True])
def test_a_large_batch_gets_the_same_answer_rendered_off_the_loop(client: TestClient, admin: dict[str, str],
                                                                  make_channel: Any, columnar: bool) -> None:
    """Past 1,000 samples the HTTP route renders its answer in a worker thread; the answer
    is the one the same body earns over MQTT (rendered by pydantic's model_dump)."""
    make_channel("site-a.p1")
    make_channel("site-a.p2")
    xs = [float(i % 100) for i in range(1500)]
    ys = [0.5 * x + 3.0 + (0.01 if i % 2 else -0.01) for i, x in enumerate(xs)]
    body: dict[str, Any] = {"source": "bulk", "columns": {"x": xs, "y": ys, "seq": list(range(1, 1501))}} \
        if columnar else {"source": "bulk", "samples": [{"x": x, "y": y, "seq": i + 1}
                                                        for i, (x, y) in enumerate(zip(xs, ys, strict=True))]}
    http = client.post("/v1/channels/site-a.p1/samples", json=body, headers=admin)
    assert http.status_code == 200, http.text
    assert http.headers["content-type"] == "application/json"
    reply = mqtt(client, "site-a.p2", json.dumps(body).encode())
    assert reply.status == 200 and http.json() == reply.body
    assert len(reply.body["residuals"]) == 1500
