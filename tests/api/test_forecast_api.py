"""The forecast of when a channel leaves tolerance, through the HTTP API: a channel whose
reference drifts by a known ramp, one that holds still, and the trace behind them.

Checks against outside sources: the ramp's crossing day is worked in this file (tolerance
/ rate); the stored trace's line against numpy.polyfit (weights 1 / u)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from curvekeeper.store.tables import CurveTrace
from fastapi.testclient import TestClient
from sqlalchemy import select

from tests.api.helpers import ok

SIG = 0.05  # noise s.d. of the reference, kPa
TOL = 1.0  # tolerance, kPa
RATE = 0.02  # the ramp, kPa per day: the reference reads this much higher each day
DAY0 = datetime(2026, 6, 1, tzinfo=UTC)
CROSSING = DAY0 + timedelta(days=TOL / RATE)  # the true curve leaves tolerance on day 50


def truth(x: np.ndarray) -> np.ndarray:
    return 2.0 + 0.5 * x


def calibrated(client: TestClient, admin: dict[str, str], cid: str, rng: np.random.Generator) -> None:
    ok(client.post("/v1/channels", headers=admin, json={
        "id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
        "output": {"name": "pressure", "unit": "kPa"}, "drift": {"tolerance": TOL}}), 201)
    xc = np.linspace(0, 100, 20)
    ok(client.post(f"/v1/channels/{cid}/calibrate", headers=admin, json={
        "points": [{"x": float(a), "y": float(b)} for a, b in zip(xc, truth(xc) + SIG * rng.standard_normal(20),
                                                                   strict=True)]}))


def feed(client: TestClient, admin: dict[str, str], cid: str, rng: np.random.Generator, days: int,
         rate: float, per_day: int = 24, start_day: int = 0) -> None:
    """One request a day from ``start_day``, ``per_day`` samples an hour apart, the reference
    offset by rate x days."""
    for day in range(start_day, start_day + days):
        hours = day + np.arange(per_day) / per_day
        x = rng.uniform(0, 100, per_day)
        y = truth(x) + rate * hours + SIG * rng.standard_normal(per_day)
        ok(client.post(f"/v1/channels/{cid}/samples", headers=admin, json={"samples": [
            {"x": float(a), "y": float(b), "t": (DAY0 + timedelta(days=float(h))).isoformat()}
            for a, b, h in zip(x, y, hours, strict=True)]}))


def trace(client: TestClient, cid: str) -> list[tuple[datetime, float, float | None]]:
    """The channel's stored trace points (t, difference, u), oldest first."""
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        pk = repo.get_channel(cid).pk
        rows = repo.session.execute(select(CurveTrace.t, CurveTrace.difference, CurveTrace.u)
                                    .where(CurveTrace.channel_pk == pk).order_by(CurveTrace.t))
        return [(t, d, u) for t, d, u in rows]


@pytest.mark.slow
def test_ramps_are_forecast_to_leave_tolerance_about_when_they_do(client: TestClient,
                                                                  admin: dict[str, str]) -> None:
    """8 channels, 30 days of a 0.02 kPa/day ramp against a 1 kPa tolerance: the true
    crossing is day 50. The interval is nominally 95 %, but the trace's scatter is not
    independent beyond lag 1 (the learner's slower wander, the reference fit's own error),
    so it is asked to hold the crossing in 6 of 8, and every point estimate to fall within
    3 days (0.06 kPa of drift) of it."""
    inside, errors = 0, []
    for i in range(8):
        cid = f"ramp.p{i}"
        calibrated(client, admin, cid, np.random.default_rng([44, i]))
        feed(client, admin, cid, np.random.default_rng([45, i]), 30, RATE)
        f = ok(client.get(f"/v1/channels/{cid}", headers=admin))["forecast"]
        assert f is not None and f["not_within_days"] is None
        on, low, high = (datetime.fromisoformat(f[k]) for k in ("leaves_tolerance_on", "low", "high"))
        assert low < on < high
        inside += low <= CROSSING <= high
        errors.append(abs(on - CROSSING) / timedelta(days=1))
        assert f["rate"] == pytest.approx(RATE, rel=0.15)
    assert inside >= 6, inside
    assert max(errors) <= 3.0, errors
    # the line is the weighted least-squares line of the stored trace (numpy.polyfit, w = 1 / u)
    pts = trace(client, cid)
    assert len(pts) == f["n_points"] == 30  # one point per request: a day apart, more than an hour
    tau = np.array([(t - pts[-1][0]).total_seconds() / 86400 for t, _, _ in pts])
    slope, _ = np.polyfit(tau, [d for _, d, _ in pts], 1, w=[1 / u for _, _, u in pts if u is not None])
    assert f["rate"] == pytest.approx(slope, rel=1e-9)
    # the fleet list carries the same forecast
    items = ok(client.get("/v1/channels", headers=admin))["items"]
    assert [i["forecast"] for i in items if i["id"] == cid] == [f]


@pytest.mark.slow
def test_a_stable_channel_is_not_expected_to_leave_within_a_year(client: TestClient,
                                                                 admin: dict[str, str]) -> None:
    rng = np.random.default_rng(42)
    calibrated(client, admin, "still.p1", rng)
    feed(client, admin, "still.p1", rng, 30, 0.0)
    f = ok(client.get("/v1/channels/still.p1", headers=admin))["forecast"]
    assert f["not_within_days"] == 365
    assert f["leaves_tolerance_on"] is None and f["low"] is None and f["high"] is None
    assert abs(f["rate"]) < 0.1 * RATE


def test_the_trace_starts_afresh_at_a_calibration_and_needs_a_tolerance(client: TestClient,
                                                                      admin: dict[str, str]) -> None:
    rng = np.random.default_rng(43)
    calibrated(client, admin, "cal.p1", rng)
    assert ok(client.get("/v1/channels/cal.p1", headers=admin))["forecast"] is None  # no trace yet
    feed(client, admin, "cal.p1", rng, 6, RATE, per_day=4)
    assert len(trace(client, "cal.p1")) == 6
    f = ok(client.get("/v1/channels/cal.p1", headers=admin))["forecast"]
    assert f is not None and f["n_points"] == 6
    # a second request within the hour of measurement time adds no point
    ok(client.post("/v1/channels/cal.p1/samples", headers=admin, json={"samples": [
        {"x": 50.0, "y": float(truth(np.array(50.0))), "t": (DAY0 + timedelta(days=5.76)).isoformat()}]}))
    assert len(trace(client, "cal.p1")) == 6
    # without a tolerance there is nothing to forecast; with it back, the same forecast
    assert ok(client.patch("/v1/channels/cal.p1", headers=admin, json={"drift": {"tolerance": None}}))[
        "forecast"] is None
    assert ok(client.patch("/v1/channels/cal.p1", headers=admin, json={"drift": {"tolerance": TOL}}))[
        "forecast"] == f
    xc = np.linspace(0, 100, 10)
    ok(client.post("/v1/channels/cal.p1/calibrate", headers=admin, json={
        "points": [{"x": float(a), "y": float(b)} for a, b in zip(xc, truth(xc), strict=True)]}))
    assert trace(client, "cal.p1") == []
    assert ok(client.get("/v1/channels/cal.p1", headers=admin))["forecast"] is None
    # a rollback that keeps the reference keeps the trace up to the snapshot (the restored
    # curve's history), dropping what later curves recorded; one that sets it starts afresh
    feed(client, admin, "cal.p1", rng, 3, RATE, per_day=2)
    snap = ok(client.post("/v1/channels/cal.p1/snapshots", headers=admin, json={}), 201)["id"]
    ok(client.post("/v1/channels/cal.p1/rollback", headers=admin, json={"snapshot": snap}))
    assert len(trace(client, "cal.p1")) == 3
    feed(client, admin, "cal.p1", rng, 2, RATE, per_day=2, start_day=3)
    assert len(trace(client, "cal.p1")) == 5
    ok(client.post("/v1/channels/cal.p1/rollback", headers=admin, json={"snapshot": snap}))
    assert len(trace(client, "cal.p1")) == 3
    ok(client.post("/v1/channels/cal.p1/rollback", headers=admin, json={"snapshot": snap, "set_reference": True}))
    assert trace(client, "cal.p1") == []
