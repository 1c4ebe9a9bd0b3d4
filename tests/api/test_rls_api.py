"""RLS through the HTTP API at its default settings (forgetting 1 asked for): one sample
per request, in file order, reproduces the NIST StRD certified least-squares fit."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
from fastapi.testclient import TestClient

NIST = Path(__file__).resolve().parent.parent / "data" / "nist"


def test_rls_with_forgetting_one_reproduces_nist_norris(client: TestClient, admin: dict[str, str],
                                                        make_channel: Any) -> None:
    """Source: NIST StRD, Norris (certified B0 -0.262323073774029, B1 1.00211681802045).
    9 significant digits or more on both (the prior P0 = 1e3 I of the old default gave 1.2
    on the intercept); the default initialisation is exact."""
    rec = json.loads((NIST / "Norris.json").read_text(encoding="ascii"))
    x = np.asarray(rec["x"], dtype=np.float64).ravel()
    make_channel("lab.norris", inputs=[{"name": "x", "unit": "1", "min": float(x.min()), "max": float(x.max())}],
                 learner={"kind": "rls", "forgetting": 1.0})
    for xi, yi in zip(x.tolist(), rec["y"], strict=True):
        r = client.post("/v1/channels/lab.norris/samples", json={"samples": [{"x": xi, "y": yi}]}, headers=admin)
        assert r.status_code == 200, r.text
    curve = client.get("/v1/channels/lab.norris/curve", headers=admin)
    assert curve.status_code == 200, curve.text
    got = np.asarray(curve.json()["poly_coefficients"])
    want = np.asarray(rec["certified"]["estimates"])
    assert np.max(np.abs(got - want) / np.abs(want)) <= 1e-9
