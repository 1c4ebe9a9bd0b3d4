"""Predict, curve and calibrate (``service/curvekeeper/api/routes/curves.py``).

Grouped per route, unauthorised and bad-input cases first. Every failing request
is checked for its status, ``error.code`` and an unchanged store. Numbers are
checked against numpy: ``numpy.polyfit`` for the coefficients, and the textbook
least-squares formulas for coefficient s.d., R-squared and the prediction term
u = s * sqrt(1 + x0' (X'X)^-1 x0).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from scipy import stats

from tests.api.helpers import Headers, expect_error
from tests.conftest import store_fingerprint

Keys = dict[str, Headers]

CH = "site-a.p1"
PREDICT = f"/v1/channels/{CH}/predict"
CURVE = f"/v1/channels/{CH}/curve"
CALIBRATE = f"/v1/channels/{CH}/calibrate"

# a straight line 3 + 0.5 x (kPa over mV) with fixed bench noise
BENCH_X = [0.0, 12.5, 25.0, 40.0, 55.0, 70.0, 85.0, 100.0]
BENCH_NOISE = [0.02, -0.05, 0.03, 0.04, -0.01, -0.06, 0.05, -0.02]
BENCH_Y = [3.0 + 0.5 * x + e for x, e in zip(BENCH_X, BENCH_NOISE, strict=True)]
# inputs to predict at: inside the declared range [0, 100], on its ends, and outside
X0 = [0.0, 12.5, 50.0, 99.0, 100.0, 150.0, -5.0]

TWO_INPUTS = {
    "inputs": [
        {"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0},
        {"name": "temp", "unit": "degC", "min": -20.0, "max": 60.0},
    ]
}


# helpers ---------------------------------------------------------------------------


def points(xs: list[Any], ys: list[float]) -> list[dict[str, Any]]:
    return [{"x": x, "y": y} for x, y in zip(xs, ys, strict=True)]


def calibrate(
    client: TestClient,
    headers: Headers,
    xs: list[Any],
    ys: list[float],
    url: str = CALIBRATE,
    **extra: Any,
) -> dict[str, Any]:
    r = client.post(url, json={"points": points(xs, ys), **extra}, headers=headers)
    assert r.status_code == 200, r.text
    return r.json()  # type: ignore[no-any-return]


def predict(
    client: TestClient,
    headers: Headers,
    x: list[Any],
    snapshot: int | None = None,
    url: str = PREDICT,
) -> dict[str, Any]:
    r = client.post(url, json={"x": x, "snapshot": snapshot}, headers=headers)
    assert r.status_code == 200, r.text
    return r.json()  # type: ignore[no-any-return]


class LineFit:
    """Ordinary least squares y = c0 + c1 x computed independently with numpy."""

    def __init__(self, xs: list[float], ys: list[float]) -> None:
        x = np.asarray(xs, dtype=np.float64)
        y = np.asarray(ys, dtype=np.float64)
        slope, intercept = np.polyfit(x, y, 1)
        self.coef = [float(intercept), float(slope)]
        X = np.column_stack([np.ones_like(x), x])
        resid = y - (intercept + slope * x)
        ssr = float(resid @ resid)
        self.n = x.size
        self.s = math.sqrt(ssr / (self.n - 2))
        self.xtx_inv = np.linalg.inv(X.T @ X)
        self.coef_sd = [float(v) for v in self.s * np.sqrt(np.diag(self.xtx_inv))]
        self.r2 = 1.0 - ssr / float(((y - y.mean()) ** 2).sum())

    def y(self, x0: list[float]) -> list[float]:
        return [self.coef[0] + self.coef[1] * v for v in x0]

    def u(self, x0: list[float]) -> list[float]:
        X0 = np.column_stack([np.ones(len(x0)), np.asarray(x0, dtype=np.float64)])
        quad = np.einsum("ij,jk,ik->i", X0, self.xtx_inv, X0)
        return [float(v) for v in self.s * np.sqrt(1.0 + quad)]


def assert_close(
    a: list[float | None], b: list[float], rel: float = 1e-9, abs_: float = 1e-9
) -> None:
    assert None not in a, a
    assert a == pytest.approx(b, rel=rel, abs=abs_)


@pytest.fixture
def channel(make_channel: Any) -> dict[str, Any]:
    """A fresh one-input linear channel ``site-a.p1`` (0..100 mV -> kPa)."""
    return make_channel(CH)  # type: ignore[no-any-return]


@pytest.fixture
def bench(client: TestClient, keys: Keys, channel: dict[str, Any]) -> dict[str, Any]:
    """``site-a.p1`` calibrated on the bench points; the calibration report."""
    return calibrate(client, keys["technician"], BENCH_X, BENCH_Y, label="bench")


# POST /v1/channels/{id}/predict ----------------------------------------------------
def test_predict_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    expect_error(client, "POST", PREDICT, 401, "unauthorized", json={"x": [1.0]})
    expect_error(
        client,
        "POST",
        PREDICT,
        401,
        "unauthorized",
        json={"x": [1.0]},
        headers={"Authorization": "Bearer ck_not-a-key"},
    )
    expect_error(
        client, "POST", PREDICT, 401, "unauthorized", json={"x": [1.0]}, headers=keys["revoked"]
    )


def test_predict_with_a_device_key_of_another_prefix_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    expect_error(
        client, "POST", PREDICT, 403, "forbidden", json={"x": [1.0]}, headers=keys["other_device"]
    )


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_predict_refuses_non_finite_inputs(
    client: TestClient, keys: Keys, channel: dict[str, Any], literal: str
) -> None:
    # raw text: Python's json module reads these literals, the schema must refuse them
    for text in (f'{{"x": [1.0, {literal}]}}', f'{{"x": [[{literal}]]}}'):
        expect_error(
            client, "POST", PREDICT, 422, "validation_error", text=text, headers=keys["device"]
        )


def test_predict_refuses_huge_numbers(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for x in (1e16, -1e300, 1.7976931348623157e308):
        expect_error(
            client,
            "POST",
            PREDICT,
            422,
            "validation_error",
            json={"x": [x]},
            headers=keys["device"],
        )
    # 1e400 overflows to inf when parsed
    expect_error(
        client,
        "POST",
        PREDICT,
        422,
        "validation_error",
        text='{"x": [1e400]}',
        headers=keys["device"],
    )


def test_predict_refuses_the_wrong_number_of_inputs(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel(CH)
    make_channel("site-a.two", **TWO_INPUTS)
    tech = keys["technician"]
    # a two-input channel given plain numbers, too many and too few values per row, ragged rows
    for x in ([10.0, 20.0], [[10.0, 20.0, 30.0]], [[10.0]], [[10.0, 20.0], [30.0]]):
        err = expect_error(
            client,
            "POST",
            "/v1/channels/site-a.two/predict",
            422,
            "invalid_request",
            json={"x": x},
            headers=tech,
        )
        assert "raw, temp" in err["message"]
    # a one-input channel given pairs
    for x in ([[10.0, 20.0]], [[1.0, 2.0], [3.0, 4.0]]):
        expect_error(client, "POST", PREDICT, 422, "invalid_request", json={"x": x}, headers=tech)


def test_predict_refuses_bad_bodies(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    dev = keys["device"]
    bodies: list[dict[str, Any]] = [
        {"x": []},
        {},
        {"x": 5.0},
        {"x": ["a"]},
        {"x": [1.0], "extra": 1},
        {"x": [1.0], "snapshot": "latest"},
        {"x": [1.0], "snapshot": 1.5},
        {"x": [1.0], "snapshot": 2**31},  # past the store's 32-bit integers: refused, not a 500
        {"x": [1.0], "snapshot": 2**63},
    ]
    for body in bodies:
        expect_error(client, "POST", PREDICT, 422, "validation_error", json=body, headers=dev)
    expect_error(client, "POST", PREDICT, 400, "malformed_json", text='{"x": [1.0,', headers=dev)


THERMISTOR = {
    "inputs": [{"name": "raw", "unit": "ohm", "min": 1000.0, "max": 40000.0}],
    "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
    "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
}


def test_predict_refuses_inputs_the_basis_cannot_take(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel("site-a.th", **THERMISTOR)
    calibrate(client, keys["technician"], [1500.0, 6000.0, 15000.0, 38000.0], [60.0, 30.0, 10.0, -10.0],
              url="/v1/channels/site-a.th/calibrate")
    for x in ([0.0], [5000.0, -1.0]):  # ln x needs x > 0
        err = expect_error(
            client,
            "POST",
            "/v1/channels/site-a.th/predict",
            422,
            "invalid_request",
            json={"x": x},
            headers=keys["device"],
        )
        assert "ln x" in err["message"]


def test_predict_unknown_channel_is_404(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for who in ("technician", "device"):
        expect_error(
            client,
            "POST",
            "/v1/channels/site-a.nope/predict",
            404,
            "channel_not_found",
            json={"x": [1.0]},
            headers=keys[who],
        )


def test_predict_unknown_snapshot_is_404(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel(CH)
    make_channel("site-a.p2")
    r = client.post("/v1/channels/site-a.p2/snapshots", headers=keys["technician"])
    assert r.status_code == 201, r.text
    other = r.json()["id"]
    for sid in (12345, -1, other):  # the last exists, but belongs to another channel
        expect_error(
            client,
            "POST",
            PREDICT,
            404,
            "snapshot_not_found",
            json={"x": [1.0], "snapshot": sid},
            headers=keys["device"],
        )


def test_predict_on_a_fresh_channel_is_409_not_calibrated(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for who in ("device", "technician", "admin"):
        err = expect_error(
            client, "POST", PREDICT, 409, "not_calibrated", json={"x": [0.0, 50.0]}, headers=keys[who]
        )
        assert "calibrat" in err["message"] and CH in err["message"]


def assert_expanded(out: dict[str, Any], coverage: float = 0.95, fixed: float | None = None) -> None:
    """U = k u per value; k Student's t (scipy.stats.t.ppf) at the coverage and the answered
    degrees of freedom truncated to an integer (GUM G.3, G.4.1 note), or the fixed k."""
    assert len(out["k"]) == len(out["u"]) == len(out["U"]) == len(out["dof"]) == len(out["y"])
    for u, U, k, dof in zip(out["u"], out["U"], out["k"], out["dof"], strict=True):
        if fixed is not None:
            assert k == fixed
        else:
            nu = math.inf if dof is None else math.floor(dof)  # null: infinite
            assert k == pytest.approx(float(stats.t.ppf(0.5 * (1.0 + coverage), nu)), rel=1e-12)
        assert k * u == U


def test_predict_after_calibration_matches_least_squares(
    client: TestClient, keys: Keys, bench: dict[str, Any]
) -> None:
    ref = LineFit(BENCH_X, BENCH_Y)
    before = store_fingerprint(client)
    out = predict(client, keys["device"], X0)
    assert store_fingerprint(client) == before  # predicting stores nothing
    assert_close(out["y"], ref.y(X0))
    assert out["reason"] == [None] * len(X0)
    # the curve's and the scatter's parts together: u = s sqrt(1 + x0' (X'X)^-1 x0)
    assert_close(out["u"], ref.u(X0))
    assert None not in out["dof"]
    assert_expanded(out)
    assert out["out_of_range"] == [False, False, False, False, False, True, True]
    assert out["version"] == bench["version"] == 1
    assert out["unit"] == "kPa"
    # 6 degrees of freedom from the bench: the outlier gate is still warming up
    assert out["quality"] == {"calibrated": True, "drift": "ok", "tolerance": "ok", "service": "in_service",
                              "warming_up": True, "stale": False}
    # a one-input channel also takes rows of one value
    assert predict(client, keys["device"], [[v] for v in X0])["y"] == out["y"]


def test_predict_states_the_channels_coverage_factor(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel(CH, coverage_factor=3.0)
    calibrate(client, keys["technician"], BENCH_X, BENCH_Y)
    out = predict(client, keys["device"], X0)
    assert out["k"] == [3.0] * len(X0)
    assert_expanded(out, fixed=3.0)


def test_predict_at_the_channels_coverage(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel(CH, coverage=0.99)
    calibrate(client, keys["technician"], BENCH_X, BENCH_Y)
    out = predict(client, keys["device"], X0)
    assert_expanded(out, coverage=0.99)


def test_predict_quality_after_a_drift_alarm(client: TestClient, keys: Keys, make_channel: Any) -> None:
    """Calibrated on the bench, then 40 samples 2 kPa above the bench line (about 50 of the
    bench's residual s.d.): the drift watch on the reference curve alarms, the learner follows
    the offset out of the 0.5 kPa tolerance, and every prediction says so."""
    make_channel(CH, drift={"tolerance": 0.5})
    calibrate(client, keys["technician"], BENCH_X, BENCH_Y)
    ok = predict(client, keys["device"], [50.0, 150.0])
    assert ok["quality"]["drift"] == "ok" and ok["quality"]["tolerance"] == "ok"
    xs, ys = stream(40, 5.0, 0.5, 7)  # 3 + 2 kPa
    body = {"samples": [{"x": x, "y": y} for x, y in zip(xs, ys, strict=True)]}
    r = client.post(f"/v1/channels/{CH}/samples", json=body, headers=keys["device"])
    assert r.status_code == 200, r.text
    out = predict(client, keys["device"], [50.0, 150.0])
    ch = client.get(f"/v1/channels/{CH}", headers=keys["technician"]).json()
    assert ch["drift"]["state"] == "alarm" and ch["drift"]["tolerance_state"] == "out_of_tolerance"
    # 6 degrees of freedom from the bench and 40 learnt samples: past the 30 of the warm-up
    assert out["quality"] == {"calibrated": True, "drift": "alarm", "tolerance": "out_of_tolerance",
                              "service": "in_service", "warming_up": False, "stale": False}
    # a value is still given, with the input past the declared range flagged
    assert out["out_of_range"] == [False, True] and None not in out["y"]
    assert out["reason"] == [None, None]
    assert_expanded(out)


RECIPROCAL = {
    "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
    "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
    "basis": {"kind": "poly", "degree": 1},
}


def test_predict_withholds_a_value_outside_the_reciprocal_transforms_domain(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    """1 / (y + 273.15) = a + b x: past the input where the line reaches zero there is no
    temperature (y + 273.15 would be infinite, then negative: below absolute zero)."""
    make_channel("site-a.rc", **RECIPROCAL)
    xs, ts = [0.0, 30.0, 60.0, 100.0], [100.0, 231.0, 420.0, 1000.0]
    calibrate(client, keys["technician"], xs, ts, url="/v1/channels/site-a.rc/calibrate")
    z = np.polyfit(xs, 1.0 / (np.asarray(ts) + 273.15), 1)  # numpy's line through the fitted space
    root = -z[1] / z[0]
    at = [50.0, root + 1.0, 200.0]
    assert 100.0 < root < 200.0 and np.polyval(z, at[1]) < 0.0 and np.polyval(z, at[2]) < 0.0
    out = predict(client, keys["device"], at, url="/v1/channels/site-a.rc/predict")
    assert out["y"][0] == pytest.approx(1.0 / np.polyval(z, 50.0) - 273.15, rel=1e-9)
    assert out["y"][1:] == [None, None]
    assert out["reason"] == [None, "outside_domain", "outside_domain"]
    assert out["u"][1:] == [None, None] and out["U"][1:] == [None, None] and out["k"][1:] == [None, None]
    assert out["u"][0] is not None and out["out_of_range"] == [False, True, True]


def test_predict_with_a_snapshot_uses_that_snapshots_curve(
    client: TestClient, keys: Keys, bench: dict[str, Any]
) -> None:
    tech = keys["technician"]
    second_y = [10.0 - 0.02 * x + e for x, e in zip(BENCH_X, BENCH_NOISE, strict=True)]
    second = calibrate(client, tech, BENCH_X, second_y)
    first_ref, second_ref = LineFit(BENCH_X, BENCH_Y), LineFit(BENCH_X, second_y)

    now = predict(client, keys["device"], X0)
    assert_close(now["y"], second_ref.y(X0))
    assert_close(now["u"], second_ref.u(X0))
    assert now["version"] == 2

    old = predict(client, keys["device"], X0, snapshot=bench["snapshot_after"])
    assert_close(old["y"], first_ref.y(X0))
    assert_close(old["u"], first_ref.u(X0))
    assert old["version"] == 1
    # the same state as the second calibration's "before" snapshot, bit for bit
    assert predict(client, keys["device"], X0, snapshot=second["snapshot_before"])["y"] == old["y"]

    # the snapshot before the first calibration has no curve: not calibrated, though the channel is
    err = expect_error(client, "POST", PREDICT, 409, "not_calibrated", headers=keys["device"],
                       json={"x": X0, "snapshot": bench["snapshot_before"]})
    assert f"snapshot {bench['snapshot_before']}" in err["message"]


# GET /v1/channels/{id}/curve ---------------------------------------------------------
def test_curve_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    expect_error(client, "GET", CURVE, 401, "unauthorized")
    expect_error(client, "GET", CURVE, 401, "unauthorized", headers=keys["revoked"])


def test_curve_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for who in ("device", "other_device"):  # even with the matching prefix
        expect_error(client, "GET", CURVE, 403, "forbidden", headers=keys[who])


def test_curve_refuses_bad_point_counts(
    client: TestClient, keys: Keys, settings: Any, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    for p in ("1", "0", "-3", "many", "2.5"):
        expect_error(
            client, "GET", CURVE, 422, "validation_error", params={"points": p}, headers=tech
        )
    expect_error(
        client,
        "GET",
        CURVE,
        413,
        "payload_too_large",
        params={"points": settings.max_curve_points + 1},
        headers=tech,
    )
    r = client.get(CURVE, params={"points": settings.max_curve_points}, headers=tech)
    assert r.status_code == 200 and len(r.json()["points"]) == settings.max_curve_points


def test_curve_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(
        client,
        "GET",
        "/v1/channels/site-a.nope/curve",
        404,
        "channel_not_found",
        headers=keys["technician"],
    )


def test_curve_of_a_fresh_channel(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    r = client.get(CURVE, params={"points": 2}, headers=keys["technician"])
    assert r.status_code == 200, r.text
    out = r.json()
    assert [p["x"] for p in out["points"]] == [0.0, 100.0]
    assert [p["y"] for p in out["points"]] == [0.0, 0.0]
    for key in ("u", "U", "k", "lower", "upper"):
        assert [p[key] for p in out["points"]] == [None, None], key
    assert out["quality"]["calibrated"] is False
    assert out["weights"] == [0.0, 0.0] and out["poly_coefficients"] == [0.0, 0.0]
    assert out["basis"]["kind"] == "poly" and out["n_samples"] == 0 and out["version"] == 0
    assert out["rmse"] is None and out["drift"]["state"] == "ok"
    assert len(client.get(CURVE, headers=keys["technician"]).json()["points"]) == 101  # the default


def test_curve_after_calibration(client: TestClient, keys: Keys, bench: dict[str, Any]) -> None:
    r = client.get(CURVE, params={"points": 11}, headers=keys["technician"])
    assert r.status_code == 200, r.text
    out = r.json()
    ref = LineFit(BENCH_X, BENCH_Y)
    grid = [10.0 * i for i in range(11)]
    xs = [p["x"] for p in out["points"]]
    ys = [p["y"] for p in out["points"]]
    us = [p["u"] for p in out["points"]]
    assert xs == pytest.approx(grid, abs=1e-12)
    assert_close(ys, ref.y(grid))
    assert_close(us, ref.u(grid))
    same = predict(client, keys["technician"], grid)
    assert [p["U"] for p in out["points"]] == same["U"] and [p["k"] for p in out["points"]] == same["k"]
    assert_expanded(same)
    for p in out["points"]:
        assert p["lower"] == p["y"] - p["U"]
        assert p["upper"] == p["y"] + p["U"]
    assert out["quality"] == same["quality"]
    assert out["weights"] == bench["weights"]
    assert out["poly_coefficients"] == bench["poly_coefficients"]
    assert_close(out["poly_coefficients"], ref.coef)
    assert_close(out["poly_coefficient_sd"], ref.coef_sd)
    assert out["version"] == 1
    # the curve agrees with predict at the same inputs, bit for bit
    assert predict(client, keys["technician"], grid)["y"] == ys


def test_curve_has_no_poly_coefficients_for_several_inputs(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel("site-a.two", **TWO_INPUTS)
    r = client.get(
        "/v1/channels/site-a.two/curve", params={"points": 9}, headers=keys["technician"]
    )
    assert r.status_code == 200, r.text
    out = r.json()
    assert "poly_coefficients" not in out
    assert all(len(p["x"]) == 2 for p in out["points"])


# POST /v1/channels/{id}/calibrate ------------------------------------------------------
def test_calibrate_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    body = {"points": points(BENCH_X, BENCH_Y)}
    expect_error(client, "POST", CALIBRATE, 401, "unauthorized", json=body)
    expect_error(client, "POST", CALIBRATE, 401, "unauthorized", json=body, headers=keys["revoked"])


def test_calibrate_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    body = {"points": points(BENCH_X, BENCH_Y)}
    for who in ("device", "other_device"):
        expect_error(client, "POST", CALIBRATE, 403, "forbidden", json=body, headers=keys[who])


def test_calibrate_with_nothing_to_fit_is_422(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    bodies: list[dict[str, Any]] = [
        {},
        {"points": []},
        {"points": [], "include_history": False},
        {"include_history": True},  # history, but nothing stored yet
    ]
    for body in bodies:
        err = expect_error(
            client, "POST", CALIBRATE, 422, "invalid_request", json=body, headers=tech
        )
        assert "no points" in err["message"]


def test_calibrate_with_too_few_distinct_points_is_422(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel(CH)
    make_channel("site-a.quad", basis={"kind": "poly", "degree": 2})
    tech = keys["technician"]
    # what the code gives: the core's FitError, mapped by the action to invalid_request
    codes = {"fit_failed", "invalid_request"}
    err = expect_error(
        client, "POST", CALIBRATE, 422, codes, json={"points": points([10.0], [8.0])}, headers=tech
    )
    assert "needs at least 2 points" in err["message"]
    err = expect_error(
        client,
        "POST",
        CALIBRATE,
        422,
        codes,
        json={"points": points([10.0, 10.0, 10.0], [8.0, 8.1, 7.9])},
        headers=tech,
    )
    assert "do not determine the curve" in err["message"]
    err = expect_error(
        client,
        "POST",
        "/v1/channels/site-a.quad/calibrate",
        422,
        codes,
        json={"points": points([10.0, 10.0, 90.0, 90.0], [1.0, 1.1, 5.0, 5.1])},
        headers=tech,
    )
    assert "do not determine the curve" in err["message"]


def test_calibrate_refuses_non_finite_and_huge_points(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    for text in (
        '{"points": [{"x": 1.0, "y": NaN}, {"x": 2.0, "y": 1.0}]}',
        '{"points": [{"x": Infinity, "y": 1.0}, {"x": 2.0, "y": 1.0}]}',
        '{"points": [{"x": [NaN], "y": 1.0}, {"x": 2.0, "y": 1.0}]}',
        '{"points": [{"x": 1.0, "y": 1e400}, {"x": 2.0, "y": 1.0}]}',
    ):
        expect_error(client, "POST", CALIBRATE, 422, "validation_error", text=text, headers=tech)
    expect_error(
        client,
        "POST",
        CALIBRATE,
        422,
        "validation_error",
        json={"points": [{"x": 1.0, "y": 1e16}, {"x": 2.0, "y": 1.0}]},
        headers=tech,
    )


def test_calibrate_refuses_the_wrong_number_of_inputs(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel(CH)
    make_channel("site-a.two", **TWO_INPUTS)
    tech = keys["technician"]
    err = expect_error(
        client,
        "POST",
        CALIBRATE,
        422,
        "invalid_request",
        json={"points": [{"x": 1.0, "y": 1.0}, {"x": [2.0, 3.0], "y": 2.0}, {"x": 4.0, "y": 3.0}]},
        headers=tech,
    )
    assert err["message"].startswith("point 1")
    err = expect_error(
        client,
        "POST",
        "/v1/channels/site-a.two/calibrate",
        422,
        "invalid_request",
        json={"points": points([1.0, 2.0, 3.0, 4.0], [1.0, 2.0, 3.0, 4.0])},
        headers=tech,
    )
    assert err["message"].startswith("point 0")


def test_calibrate_refuses_bad_bodies(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    good = points(BENCH_X, BENCH_Y)
    for body in (
        {"points": good, "extra": 1},
        {"points": [{"x": 1.0}]},
        {"points": [{"x": "a", "y": 1.0}]},
        {"points": good, "include_history": True, "last": 0},
        {"points": good, "include_history": True, "since": "2026-01-01T00:00:00"},  # no zone
        {"points": good, "label": "x" * 257},
    ):
        expect_error(client, "POST", CALIBRATE, 422, "validation_error", json=body, headers=tech)


def test_calibrate_refuses_points_the_curve_form_cannot_take(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel("site-a.th", **THERMISTOR)
    url = "/v1/channels/site-a.th/calibrate"
    tech = keys["technician"]
    err = expect_error(
        client,
        "POST",
        url,
        422,
        "invalid_request",
        headers=tech,
        json={"points": points([1000.0, 5000.0, 20000.0, 30000.0], [80.0, 40.0, -273.15, 0.0])},
    )
    assert "y + offset <= 0" in err["message"]
    err = expect_error(
        client,
        "POST",
        url,
        422,
        "invalid_request",
        headers=tech,
        json={"points": points([0.0, 5000.0, 20000.0, 30000.0], [80.0, 40.0, 5.0, 0.0])},
    )
    assert "ln x" in err["message"]


def test_calibrate_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(
        client,
        "POST",
        "/v1/channels/site-a.nope/calibrate",
        404,
        "channel_not_found",
        json={"points": points(BENCH_X, BENCH_Y)},
        headers=keys["technician"],
    )


def test_calibrate_report_matches_least_squares(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    before = store_fingerprint(client)
    rep = calibrate(client, keys["technician"], BENCH_X, BENCH_Y, label="bench check")
    ref = LineFit(BENCH_X, BENCH_Y)
    for name in (
        "weights",
        "poly_coefficients",
        "poly_coefficient_sd",
        "residual_sd",
        "r_squared",
        "n",
        "max_curve_change",
        "snapshot_before",
        "snapshot_after",
    ):
        assert name in rep, name
    assert len(rep["weights"]) == 2
    assert_close(rep["poly_coefficients"], ref.coef)
    assert_close(rep["poly_coefficient_sd"], ref.coef_sd)
    assert rep["residual_sd"] == pytest.approx(ref.s, rel=1e-9)
    assert rep["r_squared"] == pytest.approx(ref.r2, rel=1e-12)
    assert rep["n"] == len(BENCH_X)
    # from the zero curve: the largest |line| over [0, 100] is at one end
    assert rep["max_curve_change"] == pytest.approx(
        max(abs(v) for v in ref.y([0.0, 100.0])), rel=1e-12
    )
    assert rep["snapshot_before"] != rep["snapshot_after"]
    after = store_fingerprint(client)["counts"]
    assert after["snapshot"] == before["counts"]["snapshot"] + 2
    assert after["event"] == before["counts"]["event"] + 1
    assert after["sample"] == before["counts"]["sample"]


def test_calibrate_quadratic_matches_polyfit(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel("site-a.quad", basis={"kind": "poly", "degree": 2})
    xs = [0.0, 20.0, 40.0, 60.0, 80.0, 100.0]
    ys = [1.0 + 0.3 * x - 0.002 * x * x + e for x, e in zip(xs, BENCH_NOISE[:6], strict=True)]
    rep = calibrate(client, keys["technician"], xs, ys, url="/v1/channels/site-a.quad/calibrate")
    assert_close(
        rep["poly_coefficients"], [float(c) for c in np.polyfit(xs, ys, 2)[::-1]], rel=1e-8
    )


def test_calibrate_thermistor_matches_steinhart_hart_least_squares(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    """1/(T + 273.15) = A + B ln R + C (ln R)^3, fitted with numpy's lstsq on the same points."""
    make_channel("site-a.th", **THERMISTOR)
    R = [1500.0, 3000.0, 6000.0, 10000.0, 15000.0, 25000.0, 38000.0]
    # an NTC curve with a little reference noise
    A, B, C = 1.009249522e-3, 2.378405444e-4, 2.019202697e-7
    T = [
        1.0 / (A + B * math.log(r) + C * math.log(r) ** 3) - 273.15 + e
        for r, e in zip(R, [0.01, -0.02, 0.0, 0.015, -0.01, 0.005, -0.005], strict=True)
    ]
    rep = calibrate(client, keys["technician"], R, T, url="/v1/channels/site-a.th/calibrate")
    lnR = np.log(R)
    design = np.column_stack([np.ones_like(lnR), lnR, lnR**3])
    coef, *_ = np.linalg.lstsq(design, 1.0 / (np.asarray(T) + 273.15), rcond=None)
    assert rep["raw_terms"] == [0, 1, 3]
    assert_close(rep["raw_coefficients"], [float(c) for c in coef], rel=1e-7, abs_=0.0)
    assert rep["raw_coefficients"] == pytest.approx([A, B, C], rel=0.05)
    y = predict(client, keys["device"], [10000.0], url="/v1/channels/site-a.th/predict")["y"][0]
    true = 1.0 / (A + B * math.log(1e4) + C * math.log(1e4) ** 3) - 273.15
    assert y == pytest.approx(true, abs=0.03)  # within the reference noise of the true curve


def test_calibrate_changes_the_curve_and_writes_an_event(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    rep = calibrate(client, tech, BENCH_X, BENCH_Y, label="bench check")
    r = client.get(f"/v1/channels/{CH}", headers=tech)
    assert r.json()["version"] == 1 == rep["version"]
    curve = client.get(CURVE, params={"points": 3}, headers=tech).json()
    assert curve["weights"] == rep["weights"]
    assert curve["poly_coefficients"] == rep["poly_coefficients"]
    assert_close([p["y"] for p in curve["points"]], LineFit(BENCH_X, BENCH_Y).y([0.0, 50.0, 100.0]))

    r = client.get(f"/v1/channels/{CH}/events", params={"kind": "calibration"}, headers=tech)
    (event,) = r.json()["items"]
    assert event["kind"] == "calibration" and event["version"] == 1
    d = event["details"]
    assert d["label"] == "bench check" and d["n"] == len(BENCH_X) and d["history"] is None
    assert (
        d["snapshot_before"] == rep["snapshot_before"]
        and d["snapshot_after"] == rep["snapshot_after"]
    )

    snaps = {
        s["id"]: s for s in client.get(f"/v1/channels/{CH}/snapshots", headers=tech).json()["items"]
    }
    assert snaps[rep["snapshot_before"]]["reason"] == "before-calibrate"
    assert snaps[rep["snapshot_before"]]["version"] == 0
    assert snaps[rep["snapshot_after"]]["version"] == 1
    assert snaps[rep["snapshot_after"]]["label"] == "bench check"


def post_samples(
    client: TestClient,
    headers: Headers,
    xs: list[float],
    ys: list[float],
    ts: list[str] | None = None,
) -> None:
    samples: list[dict[str, Any]] = [{"x": x, "y": y} for x, y in zip(xs, ys, strict=True)]
    if ts is not None:
        for s, t in zip(samples, ts, strict=True):
            s["t"] = t
    r = client.post(f"/v1/channels/{CH}/samples", json={"samples": samples}, headers=headers)
    assert r.status_code == 200, r.text
    assert r.json()["accepted"] == len(xs), r.json()


def stream(n: int, a: float, b: float, seed: int) -> tuple[list[float], list[float]]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 100.0, n)
    y = a + b * x + rng.normal(0.0, 0.05, n)
    return [float(v) for v in x], [float(v) for v in y]


def test_calibrate_with_history(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel(CH, outlier_sd=None)  # every stored sample is accepted, so all are history
    x1, y1 = stream(25, 3.0, 0.5, 1)
    x2, y2 = stream(15, 2.0, 0.6, 2)
    post_samples(client, keys["device"], x1, y1)
    post_samples(client, keys["device"], x2, y2)
    tech = keys["technician"]

    rep = calibrate(client, tech, [], [], include_history=True)
    ref = LineFit(x1 + x2, y1 + y2)
    assert rep["n"] == 40
    assert_close(rep["poly_coefficients"], ref.coef)
    assert_close(rep["poly_coefficient_sd"], ref.coef_sd)
    assert rep["residual_sd"] == pytest.approx(ref.s, rel=1e-9)

    rep = calibrate(client, tech, [], [], include_history=True, last=15)
    assert rep["n"] == 15
    assert_close(rep["poly_coefficients"], LineFit(x2, y2).coef)

    # bench points and the newest 10 samples together
    rep = calibrate(client, tech, BENCH_X, BENCH_Y, include_history=True, last=10)
    assert rep["n"] == len(BENCH_X) + 10
    assert_close(rep["poly_coefficients"], LineFit(BENCH_X + x2[-10:], BENCH_Y + y2[-10:]).coef)

    events = client.get(
        f"/v1/channels/{CH}/events", params={"kind": "calibration"}, headers=tech
    ).json()
    hist = [e["details"]["history"] for e in events["items"]]
    assert [h["n"] for h in hist] == [40, 15, 10]
    assert hist[2]["max_seq"] == 40 and hist[2]["last"] == 10


def test_calibrate_with_history_in_a_time_window(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel(CH, outlier_sd=None)
    x1, y1 = stream(12, 3.0, 0.5, 3)
    x2, y2 = stream(12, 2.0, 0.6, 4)
    post_samples(client, keys["device"], x1, y1, [f"2026-03-01T10:{i:02d}:00Z" for i in range(12)])
    post_samples(
        client, keys["device"], x2, y2, [f"2026-03-02T10:{i:02d}:00+01:00" for i in range(12)]
    )
    tech = keys["technician"]
    rep = calibrate(client, tech, [], [], include_history=True, since="2026-03-02T00:00:00Z")
    assert rep["n"] == 12
    assert_close(rep["poly_coefficients"], LineFit(x2, y2).coef)
    rep = calibrate(client, tech, [], [], include_history=True, until="2026-03-01T10:05:00Z")
    assert rep["n"] == 6
    assert_close(rep["poly_coefficients"], LineFit(x1[:6], y1[:6]).coef)
    err = expect_error(
        client,
        "POST",
        CALIBRATE,
        422,
        "invalid_request",
        headers=tech,
        json={"include_history": True, "since": "2027-01-01T00:00:00Z"},
    )
    assert "no points" in err["message"]


def test_calibrate_keeps_the_previous_state_as_snapshot_before(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    make_channel(CH, outlier_sd=None)
    xs, ys = stream(40, 3.0, 0.5, 5)
    post_samples(client, keys["device"], xs, ys)
    learned = predict(client, keys["device"], X0)
    assert learned["version"] == 40 and all(u is not None for u in learned["u"])

    rep = calibrate(client, keys["technician"], BENCH_X, [y + 1.0 for y in BENCH_Y])
    assert rep["version"] == 41
    now = predict(client, keys["device"], X0)
    assert now["y"] != learned["y"]
    old = predict(client, keys["device"], X0, snapshot=rep["snapshot_before"])
    assert old["y"] == learned["y"] and old["u"] == learned["u"] and old["version"] == 40


def test_calibrate_dry_run_reports_the_fit_and_changes_nothing(client: TestClient, admin: dict[str, str],
                                                               make_channel: Any) -> None:
    make_channel("site-a.dry")
    body = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 51.5}, {"x": 100.0, "y": 101.0}], "label": "bench"}
    before = store_fingerprint(client)
    preview = client.post("/v1/channels/site-a.dry/calibrate", json={**body, "dry_run": True}, headers=admin)
    assert preview.status_code == 200, preview.text
    assert preview.json()["applied"] is False and preview.json()["snapshot_before"] is None
    assert store_fingerprint(client) == before
    applied = client.post("/v1/channels/site-a.dry/calibrate", json=body, headers=admin).json()
    assert applied["applied"] is True
    for key in ("weights", "poly_coefficients", "residual_sd", "r_squared", "max_curve_change"):
        assert applied[key] == preview.json()[key], key


# the reason a person gives for a calibration -------------------------------------------------

BENCH = [{"x": 0.0, "y": 0.0}, {"x": 50.0, "y": 100.0}, {"x": 100.0, "y": 200.0}]
#: reasons the request schema refuses: empty, over 500 characters, a line break, a NUL
BAD_REASONS = ["", "x" * 501, "bench check\nsecond line", "a\x00b"]


def test_a_bad_calibration_reason_is_422_and_fits_nothing(client: TestClient, keys: Keys,
                                                          channel: dict[str, Any]) -> None:
    for reason in BAD_REASONS:
        err = expect_error(client, "POST", CALIBRATE, 422, "validation_error", headers=keys["technician"],
                           json={"points": BENCH, "reason": reason})
        assert err["message"].startswith("reason: "), (reason, err)


def test_a_calibration_reason_is_kept_in_the_event_and_the_audit_trail(client: TestClient, keys: Keys,
                                                                       channel: dict[str, Any]) -> None:
    why = "yearly check against the reference bath"
    r = client.post(CALIBRATE, json={"points": BENCH, "label": "bench", "reason": why}, headers=keys["technician"])
    assert r.status_code == 200, r.text
    events = client.get(f"/v1/channels/{CH}/events", params={"kind": "calibration"}, headers=keys["technician"])
    (event,) = events.json()["items"]
    assert event["details"]["reason"] == why
    audit = client.get("/v1/audit", params={"kind": "calibration"}, headers=keys["admin"]).json()["items"]
    assert [e["summary"] for e in audit] == [f"calibrated on {CH} on 3 points (bench): {why}"]
    assert audit[0]["details"]["reason"] == why
