"""Snapshots (list, take, get), rollback and events (``service/curvekeeper/api/routes/snapshots.py``).

Grouped per route, unauthorised and bad-input cases first. Every failing request
is checked for its status, ``error.code`` and an unchanged store. A rollback must
restore a snapshot's curve bit for bit: floats are compared with ``==``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from tests.api.helpers import Headers, expect_error, ok
from tests.conftest import store_fingerprint

Keys = dict[str, Headers]

CH = "site-a.p1"
BASE = f"/v1/channels/{CH}"
SNAPSHOTS = f"{BASE}/snapshots"
ROLLBACK = f"{BASE}/rollback"
EVENTS = f"{BASE}/events"

BENCH_X = [0.0, 12.5, 25.0, 40.0, 55.0, 70.0, 85.0, 100.0]
BENCH_Y = [
    3.0 + 0.5 * x + e
    for x, e in zip(BENCH_X, [0.02, -0.05, 0.03, 0.04, -0.01, -0.06, 0.05, -0.02], strict=True)
]
X0 = [0.0, 12.5, 50.0, 99.0, 100.0, 150.0, -5.0]


# helpers ---------------------------------------------------------------------------




def take(
    client: TestClient, headers: Headers, label: str | None = None, base: str = BASE
) -> dict[str, Any]:
    body = None if label is None else {"label": label}
    return ok(client.post(f"{base}/snapshots", json=body, headers=headers), 201)  # type: ignore[no-any-return]


def calibrate(client: TestClient, headers: Headers, ys: list[float]) -> dict[str, Any]:
    body = {"points": [{"x": x, "y": y} for x, y in zip(BENCH_X, ys, strict=True)]}
    return ok(client.post(f"{BASE}/calibrate", json=body, headers=headers))  # type: ignore[no-any-return]


def predict(client: TestClient, headers: Headers, snapshot: int | None = None) -> dict[str, Any]:
    body = {"x": X0, "snapshot": snapshot}
    out: dict[str, Any] = ok(client.post(f"{BASE}/predict", json=body, headers=headers))
    return out


def walk(client: TestClient, url: str, headers: Headers, **params: Any) -> list[dict[str, Any]]:
    """Every item of a paged list, one page of ``limit=1`` at a time."""
    items: list[dict[str, Any]] = []
    cursor = None
    for _ in range(100):
        q = {"limit": 1, **params, **({"cursor": cursor} if cursor else {})}
        page = ok(client.get(url, params=q, headers=headers))
        assert len(page["items"]) <= 1
        items.extend(page["items"])
        cursor = page["next_cursor"]
        if cursor is None:
            return items
        assert page["items"], "a page with a next_cursor must not be empty"
    raise AssertionError("paging did not end")


@pytest.fixture
def channel(make_channel: Any) -> dict[str, Any]:
    return make_channel(CH, outlier_sd=None)  # type: ignore[no-any-return]


@pytest.fixture
def other_snapshot(client: TestClient, keys: Keys, make_channel: Any) -> int:
    """The id of a snapshot of another channel, ``site-a.p2``."""
    make_channel("site-a.p2")
    return take(client, keys["technician"], base="/v1/channels/site-a.p2")["id"]  # type: ignore[no-any-return]


# GET /v1/channels/{id}/snapshots -------------------------------------------------------
def test_list_snapshots_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    expect_error(client, "GET", SNAPSHOTS, 401, "unauthorized")
    expect_error(client, "GET", SNAPSHOTS, 401, "unauthorized", headers=keys["revoked"])


def test_list_snapshots_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for who in ("device", "other_device"):
        expect_error(client, "GET", SNAPSHOTS, 403, "forbidden", headers=keys[who])


def test_list_snapshots_bad_paging_is_422(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    for limit in ("0", "1001", "-1", "ten"):
        expect_error(
            client, "GET", SNAPSHOTS, 422, "validation_error", params={"limit": limit}, headers=tech
        )
    for cursor in ("garbage", "djE6YWJj"):  # not base64 of v1:<n>; "v1:abc"
        expect_error(
            client,
            "GET",
            SNAPSHOTS,
            422,
            "invalid_request",
            params={"cursor": cursor},
            headers=tech,
        )


def test_list_snapshots_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(
        client,
        "GET",
        "/v1/channels/site-a.nope/snapshots",
        404,
        "channel_not_found",
        headers=keys["technician"],
    )


def test_list_snapshots_pages_through_all(
    client: TestClient, keys: Keys, channel: dict[str, Any], other_snapshot: int
) -> None:
    tech = keys["technician"]
    assert ok(client.get(SNAPSHOTS, headers=tech)) == {"items": [], "next_cursor": None}
    made = [take(client, tech, f"s{i}") for i in range(5)]
    items = walk(client, SNAPSHOTS, tech)
    assert [s["id"] for s in items] == [s["id"] for s in made]
    assert [s["label"] for s in items] == [f"s{i}" for i in range(5)]
    assert other_snapshot not in [s["id"] for s in items]
    page = ok(client.get(SNAPSHOTS, params={"limit": 2}, headers=tech))
    assert len(page["items"]) == 2 and page["next_cursor"]
    full = ok(client.get(SNAPSHOTS, headers=tech))
    assert full["items"] == items and full["next_cursor"] is None


# POST /v1/channels/{id}/snapshots ----------------------------------------------------------
def test_take_snapshot_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    expect_error(client, "POST", SNAPSHOTS, 401, "unauthorized")
    expect_error(client, "POST", SNAPSHOTS, 401, "unauthorized", headers=keys["revoked"])


def test_take_snapshot_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for who in ("device", "other_device"):
        expect_error(client, "POST", SNAPSHOTS, 403, "forbidden", headers=keys[who])


def test_take_snapshot_bad_body_is_422(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    for body in ({"lbl": "x"}, {"label": "x" * 257}, {"label": 5}):
        expect_error(client, "POST", SNAPSHOTS, 422, "validation_error", json=body, headers=tech)


def test_take_snapshot_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(
        client,
        "POST",
        "/v1/channels/site-a.nope/snapshots",
        404,
        "channel_not_found",
        headers=keys["technician"],
    )


def test_take_snapshot(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    tech = keys["technician"]
    calibrate(client, tech, BENCH_Y)
    snap = take(client, tech, "before the move")
    assert snap["reason"] == "manual" and snap["label"] == "before the move"
    assert snap["version"] == 1 and snap["n_samples"] == 0 and snap["created_at"]
    assert take(client, tech)["label"] is None
    events = ok(client.get(EVENTS, params={"kind": "snapshot"}, headers=tech))["items"]
    assert [e["details"]["snapshot"] for e in events][0] == snap["id"]
    # the snapshot holds the channel's state at that moment
    assert predict(client, tech, snapshot=snap["id"])["y"] == predict(client, tech)["y"]


# GET /v1/channels/{id}/snapshots/{sid} --------------------------------------------------------
def test_get_snapshot_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    sid = take(client, keys["technician"])["id"]
    expect_error(client, "GET", f"{SNAPSHOTS}/{sid}", 401, "unauthorized")


def test_get_snapshot_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    sid = take(client, keys["technician"])["id"]
    expect_error(client, "GET", f"{SNAPSHOTS}/{sid}", 403, "forbidden", headers=keys["device"])


def test_get_snapshot_bad_id_is_422(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    # past the store's 32-bit integers: refused, not a 500
    for sid in ("abc", "1.5", str(2**31), str(-(2**31) - 1), str(2**63)):
        expect_error(
            client, "GET", f"{SNAPSHOTS}/{sid}", 422, "validation_error", headers=keys["technician"]
        )


def test_get_snapshot_unknown_or_of_another_channel_is_404(
    client: TestClient, keys: Keys, channel: dict[str, Any], other_snapshot: int
) -> None:
    tech = keys["technician"]
    take(client, tech)
    for sid in (987654, 2**31 - 1, other_snapshot):
        expect_error(client, "GET", f"{SNAPSHOTS}/{sid}", 404, "snapshot_not_found", headers=tech)
    expect_error(
        client,
        "GET",
        f"/v1/channels/site-a.nope/snapshots/{other_snapshot}",
        404,
        "channel_not_found",
        headers=tech,
    )


def test_get_snapshot_contents(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    tech = keys["technician"]
    rep = calibrate(client, tech, BENCH_Y)
    c0, c1 = rep["poly_coefficients"]

    before = ok(client.get(f"{SNAPSHOTS}/{rep['snapshot_before']}", headers=tech))
    assert before["id"] == rep["snapshot_before"] and before["reason"] == "before-calibrate"
    assert before["version"] == 0 and before["n_samples"] == 0
    assert before["weights"] == [0.0, 0.0] and before["poly_coefficients"] == [0.0, 0.0]
    assert before["basis"] == {"kind": "poly", "degree": 1, "intercept": True}
    assert before["config"]["inputs"][0]["max"] == 100.0 and before["rmse"] is None
    # the zero curve against the line: largest at one end of [0, 100]
    assert before["max_difference_from_current"] == pytest.approx(
        max(abs(c0), abs(c0 + 100 * c1)), rel=1e-12
    )

    after = ok(client.get(f"{SNAPSHOTS}/{rep['snapshot_after']}", headers=tech))
    assert after["reason"] == "calibration" and after["version"] == 1
    assert after["weights"] == rep["weights"]
    assert after["poly_coefficients"] == rep["poly_coefficients"]
    assert after["poly_coefficient_sd"] == rep["poly_coefficient_sd"]
    assert after["max_difference_from_current"] == 0.0
    assert after["drift"]["state"] == "ok"

    # a second calibration moves the current curve; the difference follows it
    moved = calibrate(
        client, tech, [y + 0.25 - 0.004 * x for x, y in zip(BENCH_X, BENCH_Y, strict=True)]
    )
    d0, d1 = moved["poly_coefficients"]
    again = ok(client.get(f"{SNAPSHOTS}/{rep['snapshot_after']}", headers=tech))
    expected = max(abs(d0 - c0), abs(d0 - c0 + 100 * (d1 - c1)))
    assert again["max_difference_from_current"] == pytest.approx(expected, rel=1e-9)
    assert again["weights"] == rep["weights"]  # the snapshot itself does not change


def test_get_snapshot_bad_against_is_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    sid = take(client, keys["technician"])["id"]
    for against in ("abc", "1.5", str(2**31)):
        expect_error(client, "GET", f"{SNAPSHOTS}/{sid}", 422, "validation_error", headers=keys["technician"],
                     params={"against": against})


def test_get_snapshot_against_an_unknown_snapshot_is_404(
    client: TestClient, keys: Keys, channel: dict[str, Any], other_snapshot: int
) -> None:
    tech = keys["technician"]
    sid = take(client, tech)["id"]
    for against in (987654, 2**31 - 1, other_snapshot):
        expect_error(client, "GET", f"{SNAPSHOTS}/{sid}", 404, "snapshot_not_found", headers=tech,
                     params={"against": against})


def test_curve_difference_is_the_largest_on_the_standard_grid_and_where(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    """One figure for the page, the command line and the API: the largest difference on the
    model's standard grid (201 points over [0, 100]), with where it is."""
    tech = keys["technician"]
    base = "/v1/channels/site-a.bow"
    make_channel("site-a.bow", basis={"kind": "poly", "degree": 2})

    def fit(ys: list[float]) -> dict[str, Any]:
        body = {"points": [{"x": x, "y": y} for x, y in zip(BENCH_X, ys, strict=True)]}
        return ok(client.post(f"{base}/calibrate", json=body, headers=tech))  # type: ignore[no-any-return]

    first = fit(BENCH_Y)
    # a bow: the difference is largest inside the range, at x = 100/3, between grid points
    bowed = fit([y + 1.0 - 0.0002 * (x - 100 / 3) ** 2 for x, y in zip(BENCH_X, BENCH_Y, strict=True)])
    grid = np.linspace(0.0, 100.0, 201)  # the standard grid, by numpy
    old, new = (np.polynomial.Polynomial(r["poly_coefficients"]) for r in (first, bowed))
    gap = np.abs(new(grid) - old(grid))
    snap = ok(client.get(f"{base}/snapshots/{first['snapshot_after']}", headers=tech))
    assert snap["curve_difference"] == {"against": None, "max": pytest.approx(gap.max(), rel=1e-9),
                                        "at": grid[np.argmax(gap)], "grid_points": 201, "left_out": 0}
    assert snap["curve_difference"]["at"] == 33.5
    assert snap["max_difference_from_current"] == snap["curve_difference"]["max"]
    # against another snapshot: the same figure both ways; the current curve plays no part
    fit(BENCH_Y)
    ab = ok(client.get(f"{base}/snapshots/{first['snapshot_after']}", headers=tech,
                       params={"against": bowed["snapshot_after"]}))["curve_difference"]
    ba = ok(client.get(f"{base}/snapshots/{bowed['snapshot_after']}", headers=tech,
                       params={"against": first["snapshot_after"]}))["curve_difference"]
    assert ab == {**snap["curve_difference"], "against": bowed["snapshot_after"]}
    assert (ba["max"], ba["at"]) == (ab["max"], ab["at"])
    same = ok(client.get(f"{base}/snapshots/{first['snapshot_after']}", headers=tech,
                         params={"against": first["snapshot_after"]}))["curve_difference"]
    assert (same["max"], same["at"]) == (0.0, 0.0)  # equal curves: zero, at the first grid point


def test_curve_difference_of_a_two_input_channel_names_both_inputs(
    client: TestClient, keys: Keys, make_channel: Any
) -> None:
    tech = keys["technician"]
    base = "/v1/channels/site-a.two"
    make_channel("site-a.two", inputs=[{"name": "raw", "unit": "mV", "min": 0.0, "max": 10.0},
                                       {"name": "tc", "unit": "degC", "min": 0.0, "max": 40.0}])
    pts = [(a, b) for a in (0.0, 5.0, 10.0) for b in (0.0, 20.0, 40.0)]

    def fit(c: tuple[float, float, float]) -> dict[str, Any]:
        body = {"points": [{"x": [a, b], "y": c[0] + c[1] * a + c[2] * b} for a, b in pts]}
        return ok(client.post(f"{base}/calibrate", json=body, headers=tech))  # type: ignore[no-any-return]

    first = fit((1.0, 2.0, 0.1))
    fit((1.0, 2.0, 0.1 + 0.005))  # differs by 0.005 tc: largest where tc is largest
    d = ok(client.get(f"{base}/snapshots/{first['snapshot_after']}", headers=tech))["curve_difference"]
    assert d["max"] == pytest.approx(0.005 * 40.0, rel=1e-9) and d["left_out"] == 0
    assert d["at"][1] == 40.0 and 0.0 <= d["at"][0] <= 10.0 and len(d["at"]) == 2


# POST /v1/channels/{id}/rollback --------------------------------------------------------------
def test_rollback_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    sid = take(client, keys["technician"])["id"]
    expect_error(client, "POST", ROLLBACK, 401, "unauthorized", json={"snapshot": sid})
    expect_error(
        client,
        "POST",
        ROLLBACK,
        401,
        "unauthorized",
        json={"snapshot": sid},
        headers=keys["revoked"],
    )


def test_rollback_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    sid = take(client, keys["technician"])["id"]
    for who in ("device", "other_device"):
        expect_error(
            client, "POST", ROLLBACK, 403, "forbidden", json={"snapshot": sid}, headers=keys[who]
        )


def test_rollback_bad_body(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    tech = keys["technician"]
    sid = take(client, tech)["id"]
    for body in (
        {},
        {"snapshot": None},
        {"snapshot": "latest"},
        {"snapshot": 1.5},
        {"snapshot": 2**31},
        {"snapshot": 2**63},
        [sid],
        {"snapshot": sid, "force": True},
        {"snapshot": sid, "set_reference": "yes"},
        {"snapshot": sid, "set_reference": 1},
        {"snapshot": sid, "set_reference": "true"},
        {"snapshot": sid, "set_reference": None},
    ):
        expect_error(client, "POST", ROLLBACK, 422, "validation_error", json=body, headers=tech)
    expect_error(
        client, "POST", ROLLBACK, 400, "malformed_json", text='{"snapshot": ', headers=tech
    )


def test_rollback_unknown_snapshot_is_404(
    client: TestClient, keys: Keys, channel: dict[str, Any], other_snapshot: int
) -> None:
    tech = keys["technician"]
    for sid in (424242, -1, other_snapshot):
        expect_error(
            client,
            "POST",
            ROLLBACK,
            404,
            "snapshot_not_found",
            json={"snapshot": sid},
            headers=tech,
        )
    expect_error(
        client,
        "POST",
        "/v1/channels/site-a.nope/rollback",
        404,
        "channel_not_found",
        json={"snapshot": other_snapshot},
        headers=tech,
    )


def test_rollback_restores_the_snapshot_bit_for_bit(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech, dev = keys["technician"], keys["device"]
    rep = calibrate(client, tech, BENCH_Y)
    calibrated = predict(client, dev)
    # the channel then learns from a stream off the bench line
    rng = np.random.default_rng(7)
    xs = rng.uniform(0.0, 100.0, 30)
    samples = [{"x": float(x), "y": float(3.4 + 0.47 * x + rng.normal(0.0, 0.05))} for x in xs]
    assert (
        ok(client.post(f"{BASE}/samples", json={"samples": samples}, headers=dev))["accepted"] == 30
    )
    learned = predict(client, dev)
    assert learned["y"] != calibrated["y"] and learned["version"] == 31

    before = store_fingerprint(client)
    out = ok(client.post(ROLLBACK, json={"snapshot": rep["snapshot_after"]}, headers=tech))
    assert out["version"] == 32 and out["restored_snapshot"] == rep["snapshot_after"]
    assert out["reference_curve"] == "kept"
    after = store_fingerprint(client)
    assert after["counts"]["snapshot"] == before["counts"]["snapshot"] + 1
    assert after["counts"]["sample"] == before["counts"]["sample"]

    # predictions now equal the snapshot's, to the last bit
    now = predict(client, dev)
    with_snapshot = predict(client, dev, snapshot=rep["snapshot_after"])
    assert now["y"] == with_snapshot["y"] == calibrated["y"]
    assert now["u"] == with_snapshot["u"] == calibrated["u"]
    assert now["version"] == 32
    curve = ok(client.get(f"{BASE}/curve", headers=tech))
    assert (
        curve["weights"] == rep["weights"]
        and curve["poly_coefficients"] == rep["poly_coefficients"]
    )

    # the state it replaced was snapshotted first and still predicts as the channel did
    sb = out["snapshot_before"]
    snap = ok(client.get(f"{SNAPSHOTS}/{sb}", headers=tech))
    assert snap["reason"] == "before-rollback" and snap["version"] == 31 and snap["n_samples"] == 30
    kept = predict(client, dev, snapshot=sb)
    assert kept["y"] == learned["y"] and kept["u"] == learned["u"]

    (event,) = ok(client.get(EVENTS, params={"kind": "rollback"}, headers=tech))["items"]
    assert event["version"] == 32 and event["key_id"]
    assert event["details"] == {"snapshot": rep["snapshot_after"], "snapshot_before": sb, "set_reference": False}
    assert ok(client.get(BASE, headers=tech))["version"] == 32

    # and back again: rolling back to the before-rollback snapshot restores the learned curve
    ok(client.post(ROLLBACK, json={"snapshot": sb}, headers=tech))
    assert predict(client, dev)["y"] == learned["y"]


def test_rollback_to_the_state_before_a_calibration(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    """The zero curve comes back; the calibration's curve stays the reference, so the
    tolerance check measures the zero curve against it."""
    tech = keys["technician"]
    ok(client.patch(BASE, json={"drift": {"tolerance": 0.5}}, headers=tech))  # before: settings come back
    rep = calibrate(client, tech, BENCH_Y)
    out = ok(client.post(ROLLBACK, json={"snapshot": rep["snapshot_before"]}, headers=tech))
    assert out["version"] == 3 and out["reference_curve"] == "kept"
    assert predict(client, tech)["y"] == [0.0] * len(X0)
    c0, c1 = rep["poly_coefficients"]
    # the line's largest distance from zero over [0, 100] is at an end (the standard grid holds both)
    assert out["drift"]["max_curve_change"] == pytest.approx(max(abs(c0), abs(c0 + 100 * c1)), rel=1e-12)
    assert out["drift"]["tolerance_state"] == "out_of_tolerance"


def two_calibrations(client: TestClient, tech: Headers) -> tuple[dict[str, Any], dict[str, Any]]:
    """The bench line (A), then a second calibration that moves it (B, now the reference)."""
    ok(client.patch(BASE, json={"drift": {"tolerance": 0.1}}, headers=tech))
    a = calibrate(client, tech, BENCH_Y)
    b = calibrate(client, tech, [y + 0.25 - 0.004 * x for x, y in zip(BENCH_X, BENCH_Y, strict=True)])
    return a, b


def largest_gap(a: dict[str, Any], b: dict[str, Any]) -> float:
    """max |f_a - f_b| over the standard grid (201 points over [0, 100]), by numpy."""
    grid = np.linspace(0.0, 100.0, 201)
    pa, pb = (np.polynomial.Polynomial(r["poly_coefficients"]) for r in (a, b))
    return float(np.max(np.abs(pa(grid) - pb(grid))))


def test_rollback_keeps_the_reference_by_default(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    tech = keys["technician"]
    a, b = two_calibrations(client, tech)
    out = ok(client.post(ROLLBACK, json={"snapshot": a["snapshot_after"]}, headers=tech))
    assert out["reference_curve"] == "kept"
    assert predict(client, tech)["y"] == predict(client, tech, snapshot=a["snapshot_after"])["y"]
    # curve A measured against B, the last calibration's curve: 0.25 apart at x = 0
    assert out["drift"]["max_curve_change"] == pytest.approx(largest_gap(a, b), rel=1e-9)
    assert largest_gap(a, b) > 0.1 and out["drift"]["tolerance_state"] == "out_of_tolerance"
    (event,) = ok(client.get(EVENTS, params={"kind": "rollback"}, headers=tech))["items"]
    assert event["details"]["set_reference"] is False
    assert ok(client.post(ROLLBACK, json={"snapshot": a["snapshot_after"], "set_reference": False},
                          headers=tech))["drift"]["tolerance_state"] == "out_of_tolerance"


def test_rollback_with_set_reference_makes_the_restored_curve_the_reference(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    tech = keys["technician"]
    a, b = two_calibrations(client, tech)
    out = ok(client.post(ROLLBACK, json={"snapshot": a["snapshot_after"], "set_reference": True}, headers=tech))
    assert out["reference_curve"] == "restored_snapshot"
    assert out["drift"]["max_curve_change"] == 0.0 and out["drift"]["tolerance_state"] == "ok"
    assert predict(client, tech)["y"] == predict(client, tech, snapshot=a["snapshot_after"])["y"]
    (event,) = ok(client.get(EVENTS, params={"kind": "rollback"}, headers=tech))["items"]
    assert event["details"]["set_reference"] is True
    # back to B without making it the reference: now B is measured against A
    back = ok(client.post(ROLLBACK, json={"snapshot": b["snapshot_after"]}, headers=tech))
    assert back["drift"]["max_curve_change"] == pytest.approx(largest_gap(a, b), rel=1e-9)
    assert back["drift"]["tolerance_state"] == "out_of_tolerance"


@pytest.mark.parametrize("set_reference", [False, True])
def test_rollback_keeps_the_drift_alarm_and_the_service_state(
    client: TestClient, keys: Keys, channel: dict[str, Any], set_reference: bool
) -> None:
    """A rollback restores a curve, not the channel's history: an alarm stays until it is
    acknowledged (or a calibration clears it), and so does the service state."""
    tech, dev = keys["technician"], keys["device"]
    rep = calibrate(client, tech, BENCH_Y)
    rng = np.random.default_rng(11)
    xs = rng.uniform(0.0, 100.0, 100)
    off = [{"x": float(x), "y": 3.0 + 0.5 * float(x) + 1.0 + rng.normal(0.0, 0.05)} for x in xs]
    assert ok(client.post(f"{BASE}/samples", json={"samples": off}, headers=dev))["drift"]["state"] == "alarm"
    ok(client.post(f"{BASE}/service", json={"state": "out_of_service", "note": "checking"}, headers=tech))
    body = {"snapshot": rep["snapshot_after"], "set_reference": set_reference}
    out = ok(client.post(ROLLBACK, json=body, headers=tech))
    assert out["drift"]["state"] == "alarm" and out["service_state"] == "out_of_service"
    assert out["n_samples"] == 100  # the samples stored stay counted
    assert ok(client.post(f"{BASE}/acknowledge", json={"note": "rolled back"}, headers=tech))["drift"]["state"] == "ok"


def test_rollback_to_other_drift_settings_restarts_the_watch(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    """The snapshot's settings come back with its curve; the drift watch then restarts under
    them, as after a PATCH of the detector (a CUSUM's sums mean nothing to Page-Hinkley)."""
    tech, dev = keys["technician"], keys["device"]
    rep = calibrate(client, tech, BENCH_Y)
    ok(client.patch(BASE, json={"drift": {"detector": "cusum"}}, headers=tech))
    rng = np.random.default_rng(3)
    xs = rng.uniform(0.0, 100.0, 5)
    off = [{"x": float(x), "y": 3.0 + 0.5 * float(x) + 0.08 + rng.normal(0.0, 0.01)} for x in xs]
    got = ok(client.post(f"{BASE}/samples", json={"samples": off}, headers=dev))
    assert got["drift"]["state"] == "ok" and got["drift"]["statistic"] > 0.0
    out = ok(client.post(ROLLBACK, json={"snapshot": rep["snapshot_after"]}, headers=tech))
    assert out["drift"]["detector"] == "page_hinkley" and out["drift"]["statistic"] == 0.0


# GET /v1/channels/{id}/events --------------------------------------------------------------
def test_events_without_a_key_is_401(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    expect_error(client, "GET", EVENTS, 401, "unauthorized")
    expect_error(client, "GET", EVENTS, 401, "unauthorized", headers=keys["revoked"])


def test_events_with_a_device_key_is_403(
    client: TestClient, keys: Keys, channel: dict[str, Any]
) -> None:
    for who in ("device", "other_device"):
        expect_error(client, "GET", EVENTS, 403, "forbidden", headers=keys[who])


def test_events_bad_query_is_422(client: TestClient, keys: Keys, channel: dict[str, Any]) -> None:
    tech = keys["technician"]
    for params in ({"limit": 0}, {"limit": 1001}, {"kind": "k" * 33}):
        expect_error(client, "GET", EVENTS, 422, "validation_error", params=params, headers=tech)
    expect_error(
        client, "GET", EVENTS, 422, "invalid_request", params={"cursor": "nope"}, headers=tech
    )


def test_events_unknown_channel_is_404(client: TestClient, keys: Keys) -> None:
    expect_error(
        client,
        "GET",
        "/v1/channels/site-a.nope/events",
        404,
        "channel_not_found",
        headers=keys["technician"],
    )


def test_events_paged_and_filtered(
    client: TestClient, keys: Keys, channel: dict[str, Any], other_snapshot: int
) -> None:
    tech = keys["technician"]
    rep = calibrate(client, tech, BENCH_Y)
    for i in range(3):
        take(client, tech, f"s{i}")
    ok(client.post(ROLLBACK, json={"snapshot": rep["snapshot_before"]}, headers=tech))

    items = walk(client, EVENTS, tech)
    assert [e["kind"] for e in items] == [
        "channel_created",
        "calibration",
        "snapshot",
        "snapshot",
        "snapshot",
        "rollback",
    ]
    assert [e["id"] for e in items] == sorted(e["id"] for e in items)
    assert [e["version"] for e in items] == [0, 1, 1, 1, 1, 2]
    assert all(e["at"] and e["key_id"] for e in items)
    assert ok(client.get(EVENTS, headers=tech)) == {"items": items, "next_cursor": None}

    snaps = walk(client, EVENTS, tech, kind="snapshot")
    assert [e["details"]["label"] for e in snaps] == ["s0", "s1", "s2"]
    assert [
        e["kind"]
        for e in ok(client.get(EVENTS, params={"kind": "calibration"}, headers=tech))["items"]
    ] == ["calibration"]
    assert ok(client.get(EVENTS, params={"kind": "no_such_kind"}, headers=tech)) == {
        "items": [],
        "next_cursor": None,
    }
    # another channel's events stay out of this list
    other = ok(client.get("/v1/channels/site-a.p2/events", headers=tech))["items"]
    assert [e["kind"] for e in other] == ["channel_created", "snapshot"]
    # any technician or admin key may read them
    assert ok(client.get(EVENTS, headers=keys["admin"]))["items"] == items


# the reason a person gives for a rollback ----------------------------------------------------

#: reasons the request schema refuses: empty, over 500 characters, a line break, a NUL
BAD_REASONS = ["", "x" * 501, "bench check\nsecond line", "a\x00b"]


def test_a_bad_rollback_reason_is_422_and_rolls_nothing_back(client: TestClient, keys: Keys,
                                                              channel: dict[str, Any]) -> None:
    sid = take(client, keys["technician"])["id"]
    for reason in BAD_REASONS:
        err = expect_error(client, "POST", ROLLBACK, 422, "validation_error", headers=keys["technician"],
                           json={"snapshot": sid, "reason": reason})
        assert err["message"].startswith("reason: "), (reason, err)


def test_a_rollback_reason_is_kept_in_the_event_and_the_audit_trail(client: TestClient, keys: Keys,
                                                                     channel: dict[str, Any]) -> None:
    tech = keys["technician"]
    sid = take(client, tech)["id"]
    why = "last night's curve followed a faulty reference probe"
    ok(client.post(ROLLBACK, json={"snapshot": sid, "reason": why}, headers=tech))
    (event,) = ok(client.get(EVENTS, params={"kind": "rollback"}, headers=tech))["items"]
    assert event["details"]["reason"] == why
    (entry,) = ok(client.get("/v1/audit", params={"kind": "rollback"}, headers=keys["admin"]))["items"]
    assert entry["summary"] == f"rolled on {CH} back to snapshot {sid}: {why}"
    assert entry["details"]["reason"] == why
    # without a reason the event carries none, and the summary is as before
    ok(client.post(ROLLBACK, json={"snapshot": sid}, headers=tech))
    last = ok(client.get("/v1/audit", params={"kind": "rollback"}, headers=keys["admin"]))["items"][-1]
    assert "reason" not in last["details"] and last["summary"] == f"rolled on {CH} back to snapshot {sid}"
