"""The operating range through the API: declared and changed by PATCH, answered with the
channel and the curve, and the one place every curve difference is taken (the tolerance
check, a calibration's change, snapshot differences)."""

from __future__ import annotations

from typing import Any

import numpy as np
from fastapi.testclient import TestClient

from tests.api.helpers import CODES_422, Keys, expect_error, ok

CHANNELS = "/v1/channels"
CID = "site-a.h1"
#: y = 1 + 2 s + w2 max(0, s) on s = x / 50 - 1: the hinge term moves the curve above x = 50 only
HINGE = {"id": CID, "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
         "output": {"name": "pressure", "unit": "kPa"}, "basis": {"kind": "hinge", "knots": [50.0]},
         "drift": {"tolerance": 1.0}}
XS = np.linspace(0.0, 100.0, 11)


def bench(bump: float) -> list[dict[str, float]]:
    s = XS / 50.0 - 1.0
    return [{"x": float(x), "y": float(y)} for x, y in zip(XS, 1.0 + 2.0 * s + bump * np.maximum(0.0, s),
                                                           strict=True)]


def largest_bump(bump: float, lo: float, hi: float) -> float:
    """numpy: the largest |bump max(0, s)| on 100,001 points of [lo, hi]."""
    x = np.linspace(lo, hi, 100_001)
    return float(np.max(np.abs(bump * np.maximum(0.0, x / 50.0 - 1.0))))


def patch_range(client: TestClient, keys: Keys, rng: list[float] | None) -> dict[str, Any]:
    out: dict[str, Any] = ok(client.patch(f"{CHANNELS}/{CID}", json={"inputs": [{"operating_range": rng}]},
                                          headers=keys["technician"]))
    return out


def test_patch_refuses_a_bad_operating_range_and_changes_nothing(client: TestClient, keys: Keys,
                                                                 admin: dict[str, str]) -> None:
    ok(client.post(CHANNELS, json=HINGE, headers=admin), 201)
    url = f"{CHANNELS}/{CID}"
    expect_error(client, "PATCH", url, 403, "forbidden", headers=keys["device"],
                 json={"inputs": [{"operating_range": [10, 40]}]})
    for rng, why in (([40, 10], "lo < hi"), ([10, 10], "lo < hi"), ([-1, 40], "inside the input range"),
                     ([10, 101], "inside the input range"), ([10], None), ([10, "a"], None)):
        err = expect_error(client, "PATCH", url, 422, CODES_422, headers=keys["technician"],
                           json={"inputs": [{"operating_range": rng}]})
        if why:
            assert why in err["message"] and err["message"].startswith("inputs[0].operating_range:"), err
    for change in ([{"operating_range": [10, 40]}, {"operating_range": [10, 40]}], None,
                   [{"operating_range": [10, 40], "max": 200}], [{"unit": "V"}]):
        expect_error(client, "PATCH", url, 409, "immutable_field", headers=keys["technician"],
                     json={"inputs": change})
    expect_error(client, "PATCH", url, 422, CODES_422, headers=keys["technician"], json={"inputs": [5]})
    expect_error(client, "GET", f"{url}/curve", 422, CODES_422, headers=keys["technician"],
                 params={"over": "everywhere"})


def test_every_curve_difference_is_taken_over_the_operating_range(client: TestClient, keys: Keys,
                                                                  admin: dict[str, str]) -> None:
    ch = ok(client.post(CHANNELS, json=HINGE, headers=admin), 201)
    assert ch["operating_range"] == [{"name": "raw", "min": 0.0, "max": 100.0, "source": "input_range"}]
    tech = keys["technician"]
    cal = f"{CHANNELS}/{CID}/calibrate"
    ok(client.post(cal, json={"points": bench(0.0)}, headers=tech))
    ch = ok(client.get(f"{CHANNELS}/{CID}", headers=tech))
    assert ch["operating_range"][0]["source"] == "calibration"  # no sample yet: the bench points' span, 0 to 100
    # a calibration's change: the bump lies above x = 50, inside the span of the points
    preview = ok(client.post(cal, json={"points": bench(5.0), "dry_run": True}, headers=tech))
    assert abs(preview["max_curve_change"] - largest_bump(5.0, 0.0, 100.0)) < 1e-9

    declared = patch_range(client, keys, [10.0, 40.0])
    assert declared["inputs"][0]["operating_range"] == [10.0, 40.0]
    assert declared["operating_range"] == [{"name": "raw", "min": 10.0, "max": 40.0, "source": "declared"}]
    preview = ok(client.post(cal, json={"points": bench(5.0), "dry_run": True}, headers=tech))
    assert abs(preview["max_curve_change"] - largest_bump(5.0, 10.0, 40.0)) < 1e-9  # 0: no bump below 50
    applied = ok(client.post(cal, json={"points": bench(5.0)}, headers=tech))

    # snapshot differences: the curve before the bump against the current one
    url = f"{CHANNELS}/{CID}/snapshots/{applied['snapshot_before']}"
    assert abs(ok(client.get(url, headers=tech))["curve_difference"]["max"]) < 1e-9
    # the tolerance check: the unbumped curve back, under the bumped reference
    ok(client.post(f"{CHANNELS}/{CID}/rollback", json={"snapshot": applied["snapshot_before"]}, headers=tech))
    ch = ok(client.get(f"{CHANNELS}/{CID}", headers=tech))
    assert ch["drift"]["tolerance_state"] == "ok" and abs(ch["drift"]["max_curve_change"]) < 1e-9

    cleared = patch_range(client, keys, None)  # back to the span of the bench points: 0 to 100
    assert cleared["operating_range"] == [{"name": "raw", "min": 0.0, "max": 100.0, "source": "calibration"}]
    assert cleared["drift"]["tolerance_state"] == "out_of_tolerance"
    assert abs(cleared["drift"]["max_curve_change"] - largest_bump(5.0, 0.0, 100.0)) < 1e-9
    bumped = f"{CHANNELS}/{CID}/snapshots/{applied['snapshot_after']}"
    diff = ok(client.get(bumped, headers=tech))["curve_difference"]
    assert abs(diff["max"] - largest_bump(5.0, 0.0, 100.0)) < 1e-9 and diff["at"] == 100.0
    # two snapshots, both taken while [10, 40] was declared: compared where the channel is used now
    pair = ok(client.get(url, params={"against": applied["snapshot_after"]}, headers=tech))["curve_difference"]
    assert abs(pair["max"] - largest_bump(5.0, 0.0, 100.0)) < 1e-9 and pair["against"] == applied["snapshot_after"]
    patch_range(client, keys, [10.0, 40.0])
    pair = ok(client.get(url, params={"against": applied["snapshot_after"]}, headers=tech))["curve_difference"]
    assert abs(pair["max"]) < 1e-9


def test_the_curve_over_the_operating_range_and_the_residual_sd_in_output_units(
        client: TestClient, keys: Keys, admin: dict[str, str]) -> None:
    body = {"id": "site-a.ntc", "inputs": [{"name": "raw", "unit": "ohm", "min": 1000.0, "max": 40000.0,
                                           "operating_range": [5000, 20000]}],
            "output": {"name": "t", "unit": "degC", "transform": "reciprocal", "offset": 273.15}}
    ok(client.post(CHANNELS, json=body, headers=admin), 201)
    tech = keys["technician"]
    rng = np.random.default_rng(5)
    x = np.linspace(6000.0, 18000.0, 20)
    y = 1.0 / (3.0e-3 + 4.0e-8 * (x - 5000.0)) - 273.15 + rng.normal(0.0, 0.05, x.size)
    rep = ok(client.post("/v1/channels/site-a.ntc/calibrate",
                         json={"points": [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]},
                         headers=tech))
    c = ok(client.get("/v1/channels/site-a.ntc/curve", params={"points": 11, "over": "operating"}, headers=tech))
    assert c["over"] == "operating" and [p["x"] for p in c["points"]] == np.linspace(5000, 20000, 11).tolist()
    whole = ok(client.get("/v1/channels/site-a.ntc/curve", params={"points": 11}, headers=tech))
    assert whole["over"] == "input" and whole["points"][-1]["x"] == 40000.0
    # the output-unit s.d.: residual_sd |dy/dz| = residual_sd / z^2 at its largest over [5000, 20000]
    s = (np.linspace(5000.0, 20000.0, 100_001) - 20500.0) / 19500.0
    z = c["weights"][0] + c["weights"][1] * s
    assert abs(rep["residual_sd_output"] / (rep["residual_sd"] * float(np.max(1.0 / z**2))) - 1) < 1e-6
    ch = ok(client.get("/v1/channels/site-a.ntc", headers=tech))
    assert abs(ch["residual_sd_output"] / (ch["residual_sd"] * float(np.max(1.0 / z**2))) - 1) < 1e-6
    assert c["residual_sd_output"] == ch["residual_sd_output"]
    assert rep["raw_term_names"] == c["raw_term_names"] == ["1", "raw"]
