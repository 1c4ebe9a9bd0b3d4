"""The channel as a whole through the HTTP API at default settings: the expanded
uncertainty covers, and a step the learner would absorb raises the drift alarm.

Smaller samples than tests/core/test_channel_trust.py (which pins the figures on seeded
streams); here the point is that the API path (create, calibrate, post, predict) gives the
user the same behaviour. Coverage nominal 95 % (GUM G.3, k from Student's t).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from fastapi.testclient import TestClient

SIG = 0.1  # noise s.d. of the reference, output units


def truth(x: np.ndarray) -> np.ndarray:
    return 2.0 + 0.5 * x


def calibrated(client: TestClient, admin: dict[str, str], cid: str, rng: np.random.Generator, points: int) -> None:
    r = client.post("/v1/channels", headers=admin, json={
        "id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
        "output": {"name": "value", "unit": "degC"}})
    assert r.status_code == 201, r.text
    xc = np.linspace(0, 100, points)
    yc = truth(xc) + SIG * rng.standard_normal(points)
    r = client.post(f"/v1/channels/{cid}/calibrate", headers=admin,
                    json={"points": [{"x": float(a), "y": float(b)} for a, b in zip(xc, yc, strict=True)]})
    assert r.status_code == 200, r.text


def post(client: TestClient, admin: dict[str, str], cid: str, x: np.ndarray, y: np.ndarray) -> dict[str, Any]:
    r = client.post(f"/v1/channels/{cid}/samples", headers=admin,
                    json={"samples": [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]})
    assert r.status_code == 200, r.text
    out: dict[str, Any] = r.json()
    return out


def test_predictions_after_a_five_point_calibration_cover_95_percent(client: TestClient,
                                                                      admin: dict[str, str]) -> None:
    """150 channels, 4 predictions each, against a new reference reading. With 3 degrees of
    freedom k is 3.18; a fixed k = 2 covers about 87 % here, below the bound."""
    hits = []
    for i in range(150):
        rng = np.random.default_rng([31, i])
        calibrated(client, admin, f"cov.c{i}", rng, 5)
        x = rng.uniform(0, 100, 4)
        r = client.post(f"/v1/channels/cov.c{i}/predict", headers=admin, json={"x": x.tolist()})
        assert r.status_code == 200, r.text
        p = r.json()
        assert p["dof"] == [3.0] * 4 and p["quality"]["calibrated"]
        y, U = np.array(p["y"]), np.array(p["U"])
        hits.extend(np.abs(truth(x) + SIG * rng.standard_normal(4) - y) <= U)
    assert 0.92 <= np.mean(hits) <= 0.98


def test_a_one_sd_step_after_a_calibration_raises_the_alarm(client: TestClient, admin: dict[str, str]) -> None:
    """20 channels calibrated on 10 points, 200 samples in control, then +1 s.d. for 300:
    no alarm before the step, and an alarm within 100 samples of it in 18 or more (the
    learner alone absorbed such a step in about 20 samples and never alarmed)."""
    delays = []
    for i in range(20):
        rng = np.random.default_rng([32, i])
        cid = f"step.c{i}"
        calibrated(client, admin, cid, rng, 10)
        x = rng.uniform(0, 100, 200)
        assert post(client, admin, cid, x, truth(x) + SIG * rng.standard_normal(200))["drift"]["state"] == "ok"
        x = rng.uniform(0, 100, 300)
        post(client, admin, cid, x, truth(x) + SIG + SIG * rng.standard_normal(300))
        alarms = client.get(f"/v1/channels/{cid}/events", params={"kind": "drift_alarm"}, headers=admin).json()
        delays.append(alarms["items"][0]["details"]["sample_seq"] - 200 if alarms["items"] else 301)
    assert sum(d <= 100 for d in delays) >= 18, delays
