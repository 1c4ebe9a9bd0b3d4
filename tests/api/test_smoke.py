from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient

from tests.conftest import store_fingerprint


def test_create_and_learn(client: TestClient, keys: dict[str, Any], make_channel: Any) -> None:
    make_channel()
    before = store_fingerprint(client)
    r = client.post("/v1/channels/site-a.p1/samples", json={"samples": [{"x": 1.0, "y": 2.0}]},
                    headers=keys["device"])
    assert r.status_code == 200, r.text
    assert store_fingerprint(client) != before
