"""ChannelModel against published sensor equations and against least squares.

Sources: IEC 60751 (Callendar-Van Dusen constants of Pt100 thermometers) and the
Steinhart-Hart coefficients of a 10 kohm NTC thermistor, both as numbers in
tests/data/standards.json (see tests/data/README.md); numpy's least squares.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel, ConfigError, StateError
from curvekeeper.core.learners import RECOVER, ST_SCALE
from curvekeeper.core.model import CURVE_GRID


def model_of(body: dict[str, Any]) -> ChannelModel:
    """A fresh model for a channel body, validated as the service validates it."""
    return ChannelModel.from_config(channel_config(body))


DATA = json.loads((Path(__file__).parents[1] / "data" / "standards.json").read_text())
PT = DATA["iec60751_pt100"]
SH = DATA["steinhart_hart_10k_ntc"]


def pt100(t: np.ndarray) -> np.ndarray:
    """IEC 60751 above 0 degC: R = R0 (1 + A t + B t^2)."""
    return PT["R0_ohm"] * (1 + PT["A_per_degC"] * t + PT["B_per_degC2"] * t * t)


def channel(**over: Any) -> dict[str, Any]:
    cfg: dict[str, Any] = {"inputs": [{"name": "raw", "min": -5.0, "max": 20.0}],
                           "basis": {"kind": "poly", "degree": 2}, "outlier_sd": None}
    cfg.update(over)
    return cfg


def quadratic_stream(seed: int, n: int = 2000) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(-5, 20, n)
    return x, 1 + 0.3 * x - 0.01 * x**2 + rng.normal(0, 0.05, n)


# --- IEC 60751 ---------------------------------------------------------------------

def test_pt100_quadratic_fit_recovers_iec60751_constants() -> None:
    # source: IEC 60751, A = 3.9083e-3, B = -5.775e-7, R0 = 100 ohm
    t = np.linspace(PT["t_min_degC"], PT["t_max_degC"], 86)
    m = model_of({
        "inputs": [{"name": "t", "unit": "degC", "min": 0, "max": 850}],
        "output": {"name": "resistance", "unit": "ohm"},
        "basis": {"kind": "poly", "degree": 2},
    })
    c = m.fit_closed_form(t, pt100(t))["poly_coefficients"]
    R0 = PT["R0_ohm"]
    assert c[0] == pytest.approx(R0, rel=1e-9)
    assert c[1] / R0 == pytest.approx(PT["A_per_degC"], rel=1e-6)
    assert c[2] / R0 == pytest.approx(PT["B_per_degC2"], rel=1e-6)
    pts = np.array(PT["check_points"])
    y, _ = m.predict(pts[:, 0])
    np.testing.assert_allclose(y, pts[:, 1], atol=1e-9)


def test_pt100_inverse_curve_within_0p01_degC() -> None:
    # temperature from resistance: a degree-5 Chebyshev curve over the IEC 60751 range
    t = np.linspace(0, 850, 86)
    m = model_of({
        "inputs": [{"name": "r", "unit": "ohm", "min": 100.0, "max": 390.481125}],
        "output": {"name": "temperature", "unit": "degC"},
        "basis": {"kind": "poly", "degree": 5},
    })
    m.fit_closed_form(pt100(t), t)
    t_check = np.linspace(0, 850, 1701)
    y, _ = m.predict(pt100(t_check))
    assert np.max(np.abs(y - t_check)) < 0.01
    pts = np.array(PT["check_points"])
    y, _ = m.predict(pts[:, 1])
    assert np.max(np.abs(y - pts[:, 0])) < 0.01


# --- Steinhart-Hart ------------------------------------------------------------------

def thermistor_channel() -> ChannelModel:
    return model_of({
        "inputs": [{"name": "raw", "unit": "ohm", "min": 300, "max": 40000}],
        "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
        "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
    })


def test_steinhart_hart_coefficients_recovered_exactly() -> None:
    # source: Steinhart-Hart set quoted for 10 kohm NTC thermistors (standards.json)
    R = np.geomspace(300, 40000, 60)
    L = np.log(R)
    t = 1.0 / (SH["A"] + SH["B"] * L + SH["C"] * L**3) - 273.15
    m = thermistor_channel()
    report = m.fit_closed_form(R, t)
    assert report["raw_terms"] == [0, 1, 3]
    np.testing.assert_allclose(report["raw_coefficients"], [SH["A"], SH["B"], SH["C"]], rtol=1e-9)
    pts = np.array(SH["check_points_ohm_degC"])
    y, u = m.predict(pts[:, 0])
    # check points are rounded to 0.1 ohm or better: 0.002 degC covers that rounding
    np.testing.assert_allclose(y, pts[:, 1], atol=2e-3)
    assert np.all(u < 1e-6)


# --- curve differences ------------------------------------------------------------------

def test_curve_difference_leaves_out_points_where_a_curve_is_not_finite() -> None:
    """The largest difference over the standard grid (numpy's linspace of CURVE_GRID points),
    among points where both curves are finite; max_curve_difference is not finite then."""
    m = model_of({
        "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 10.0}],
        "output": {"name": "flow", "unit": "l/min", "transform": "log", "offset": 1.0},
        "basis": {"kind": "poly", "degree": 1},
    })
    m.s.w = np.array([0.0, 800.0])  # ln(y + 1) = 800 t on t in [-1, 1]: exp overflows near the top
    flat = np.zeros(2)  # y = e^0 - 1 = 0 everywhere
    t = np.linspace(-1.0, 1.0, CURVE_GRID)
    with np.errstate(over="ignore"):
        gap = np.abs(np.exp(800.0 * t) - 1.0)
    finite = np.isfinite(gap)
    largest, at, left_out = m.curve_difference(flat)
    assert 0 < left_out == CURVE_GRID - finite.sum()
    assert largest == pytest.approx(gap[finite].max(), rel=1e-12)
    assert at is not None and at[0] == pytest.approx(5.0 + 5.0 * t[finite][-1], rel=1e-12)
    assert not np.isfinite(m.max_curve_difference(flat))
    same, where, n = m.curve_difference(m.s.w)  # itself: zero where finite, first at the grid's start
    assert (same, n) == (0.0, left_out) and where is not None and where[0] == 0.0
    m.s.w = np.array([np.nan, 0.0])  # nowhere finite
    assert m.curve_difference(flat) == (None, None, CURVE_GRID)


# --- learners against the closed form -----------------------------------------------

def test_rls_without_forgetting_equals_closed_form() -> None:
    x, y = quadratic_stream(3)
    exact = model_of(channel())
    exact.fit_closed_form(x, y)
    rls = model_of(channel(learner={"kind": "rls", "forgetting": 1.0,
                                                    "initial_covariance": 1e8}))
    rls.learn(x, y)
    span = np.ptp(exact.curve_values(exact.weights))
    assert rls.max_curve_difference(exact.weights) < 1e-6 * span
    # and numpy's least squares in raw units agrees with both
    ref = np.polynomial.polynomial.polyfit(x, y, 2)
    np.testing.assert_allclose(exact.raw_coefficients()["poly_coefficients"], ref, rtol=1e-9)


@pytest.mark.parametrize("schedule", [
    {"kind": "normalized", "mu": 0.1},
    {"kind": "inverse_time", "eta0": 0.5, "tau": 100, "power": 0.6},
    {"kind": "step", "eta0": 0.3, "gamma": 0.5, "every": 2000},
])
def test_sgd_converges_to_closed_form_optimum(schedule: dict[str, Any]) -> None:
    x, y = quadratic_stream(4)
    exact = model_of(channel())
    exact.fit_closed_form(x, y)
    span = np.ptp(exact.curve_values(exact.weights))
    m = model_of(channel(learner={"kind": "sgd", "schedule": schedule}))
    rng = np.random.default_rng(5)
    for _ in range(10):
        idx = rng.permutation(x.size)
        m.learn(x[idx], y[idx])
    assert m.max_curve_difference(exact.weights) < 0.01 * span


@pytest.mark.parametrize("scale", [1e-3, 1e-1, 1.0, 1e3, 1e6])
def test_normalized_sgd_is_stable_whatever_the_input_units(scale: float) -> None:
    x, y = quadratic_stream(6)
    exact = model_of(channel())
    exact.fit_closed_form(x, y)
    span = np.ptp(exact.curve_values(exact.weights))
    m = model_of(channel(
        inputs=[{"name": "raw", "min": -5.0 * scale, "max": 20.0 * scale}],
        learner={"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.1}}))
    rng = np.random.default_rng(7)
    for _ in range(10):
        idx = rng.permutation(x.size)
        result = m.learn(x[idx] * scale, y[idx])
        assert all(s == "accepted" for s in result.status)
    assert m.max_curve_difference(exact.weights) < 0.01 * span


def test_sgd_step_matches_plain_lms_recursion() -> None:
    # an independent plain-numpy LMS loop on the same design matrix
    x, y = quadratic_stream(8, 300)
    m = model_of(channel(learner={"kind": "sgd",
                                                  "schedule": {"kind": "constant", "eta0": 0.05}}))
    Phi = m.basis.expand(x.reshape(-1, 1))
    w = np.zeros(3)
    for phi, target in zip(Phi, y, strict=True):
        w = w + 0.05 * (target - w @ phi) * phi
    m.learn(x, y)
    np.testing.assert_allclose(m.weights, w, rtol=1e-12)


def test_rls_matches_textbook_recursion_with_forgetting() -> None:
    """The textbook recursion plus the floor (1 - lambda)^2 I of core/rls.py; the trace
    stays under its bound on a moving input, so the cap never acts."""
    x, y = quadratic_stream(9, 300)
    lam, p0 = 0.98, 100.0
    m = model_of(channel(learner={"kind": "rls", "forgetting": lam,
                                                  "initial_covariance": p0}))
    Phi = m.basis.expand(x.reshape(-1, 1))
    w, P = np.zeros(3), np.eye(3) * p0
    for phi, target in zip(Phi, y, strict=True):
        k = P @ phi / (lam + phi @ P @ phi)
        w = w + k * (target - w @ phi)
        P = (P - np.outer(k, phi @ P)) / lam + (1 - lam) ** 2 * np.eye(3)
    m.learn(x, y)
    assert np.trace(m.s.cov) < 10 * 3 * p0
    np.testing.assert_allclose(m.weights, w, rtol=1e-9)
    np.testing.assert_allclose(m.s.cov, P, rtol=1e-7, atol=1e-12)


# --- uncertainty ------------------------------------------------------------------------

def test_prediction_uncertainty_after_fit_is_the_regression_prediction_interval_term() -> None:
    # textbook: u^2 = s^2 (1 + x0' (X'X)^-1 x0), computed here in raw units with numpy
    rng = np.random.default_rng(10)
    x = rng.uniform(0, 100, 40)
    y = 2 + 0.5 * x + rng.normal(0, 0.3, 40)
    m = model_of({"inputs": [{"name": "raw", "min": 0, "max": 100}]})
    rep = m.fit_closed_form(x, y)
    X = np.column_stack([np.ones_like(x), x])
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    s2 = np.sum((y - X @ beta) ** 2) / (40 - 2)
    x0 = np.array([0.0, 37.0, 100.0, 150.0])
    X0 = np.column_stack([np.ones_like(x0), x0])
    expected = np.sqrt(s2 * (1 + np.einsum("ij,jk,ik->i", X0, np.linalg.pinv(X.T @ X), X0)))
    _, u = m.predict(x0)
    np.testing.assert_allclose(u, expected, rtol=1e-9)
    assert rep["residual_sd"] == pytest.approx(np.sqrt(s2), rel=1e-12)
    assert m.out_of_range(x0).tolist() == [False, False, False, True]


def test_transformed_output_uncertainty_is_first_order_propagation() -> None:
    m = thermistor_channel()
    rng = np.random.default_rng(11)
    R = np.geomspace(300, 40000, 80)
    L = np.log(R)
    t = 1.0 / (SH["A"] + SH["B"] * L + SH["C"] * L**3) - 273.15 + rng.normal(0, 0.01, R.size)
    m.fit_closed_form(R, t)
    y, u = m.predict([5000.0])
    Phi = m.basis.expand(np.array([[5000.0]]))
    z = float((Phi @ m.weights)[0])
    s = m.residual_sd()
    assert s is not None
    uz = s * np.sqrt(1 + Phi[0] @ m.s.cov @ Phi[0])
    # y = 1/z - 273.15, |dy/dz| = 1/z^2
    assert u[0] == pytest.approx(uz / z**2, rel=1e-9)
    assert 0.001 < u[0] < 0.05


# --- guards ---------------------------------------------------------------------------

def test_outlier_gate_opens_after_warmup_and_rejects_without_learning() -> None:
    x, y = quadratic_stream(12, 200)
    m = model_of(channel(outlier_sd=6.0))
    early = m.learn([1.0], [1000.0])  # before the warm-up: learned
    assert early.status == ["accepted"]
    m2 = model_of(channel(outlier_sd=6.0))
    m2.learn(x, y)
    w = m2.weights.copy()
    res = m2.learn([1.0], [1000.0])
    assert res.status == ["outlier"]
    assert np.array_equal(m2.weights, w)
    assert m2.summary()["n_rejected"] == 1
    assert m2.summary()["n_samples"] == 201


def test_lasting_step_is_flagged_even_though_the_gate_rejects_it() -> None:
    x, y = quadratic_stream(13, 500)
    m = model_of(channel(outlier_sd=6.0))
    m.learn(x, y)
    x2, y2 = quadratic_stream(14, 200)
    res = m.learn(x2, y2 + 5.0)  # about 100 residual s.d.
    assert res.status.count("outlier") > 150
    assert m.summary()["drift"]["state"] == "alarm"
    assert any(e["kind"] == "drift_alarm" for e in res.events)


def test_divergence_guard_halves_an_unstable_step_and_earns_it_back() -> None:
    x, y = quadratic_stream(15, 400)
    m = model_of(channel(learner={"kind": "sgd",
                                                  "schedule": {"kind": "constant", "eta0": 20.0}}))
    res = m.learn(x, y)
    guards = [e for e in res.events if e["kind"] == "guard"]
    assert guards and np.isfinite(m.weights).all()
    scale = 1.0  # halved per guarded step, times RECOVER per applied one, at most 1
    for status in res.status:
        scale = scale * 0.5 if status == "guard" else min(1.0, scale * RECOVER)
    assert m.s.st[ST_SCALE] == scale
    # once the step is small enough it learns: the last residuals are at the noise level
    assert np.nanstd(res.residuals[-100:]) < 0.2


def test_the_step_scale_comes_back_after_a_run_of_wild_inputs() -> None:
    """29 samples at an input far beyond the range once shrank the step for good; now they
    are held back as out of range, and a guard's halving is earned back by good samples."""
    m = model_of(channel())
    x, y = quadratic_stream(17, 300)
    m.learn(x, y)
    wild = m.learn(np.full(29, 1e15), np.ones(29))
    assert set(wild.status) == {"out_of_range"}
    m.s.st[ST_SCALE] = 2e-9  # as 29 halvings leave it
    m.learn(*quadratic_stream(18, 2000))
    assert m.s.st[ST_SCALE] == 1.0


def test_tolerance_check_against_the_last_calibration() -> None:
    x, y = quadratic_stream(16, 500)
    m = model_of(channel(drift={"detector": "cusum", "tolerance": 0.5}))
    m.fit_closed_form(x, y)
    assert m.summary()["drift"]["tolerance_state"] == "ok"
    res = m.learn(*quadratic_stream(17, 300))
    assert m.summary()["drift"]["tolerance_state"] == "ok"
    x3, y3 = quadratic_stream(18, 3000)
    res = m.learn(x3, y3 + 1.0)
    assert m.summary()["drift"]["tolerance_state"] == "out_of_tolerance"
    assert m.summary()["drift"]["max_curve_change"] > 0.5
    assert [e["kind"] for e in res.events if "tolerance" in e["kind"]] == ["out_of_tolerance"]


# --- state ------------------------------------------------------------------------------

def test_state_round_trip_is_bit_for_bit() -> None:
    x, y = quadratic_stream(19, 600)
    for learner in ({"kind": "sgd"}, {"kind": "rls", "forgetting": 0.99}):
        a = model_of(channel(learner=learner, outlier_sd=6.0))
        a.learn(x[:300], y[:300])
        b = ChannelModel.from_state(a.config, json.loads(json.dumps(a.to_state())))
        assert b.to_state() == a.to_state()
        ra = a.learn(x[300:], y[300:])
        rb = b.learn(x[300:], y[300:])
        assert a.weights.tobytes() == b.weights.tobytes()
        assert ra.residuals.tobytes() == rb.residuals.tobytes()
        assert a.to_state() == b.to_state()


def test_batches_split_anywhere_give_the_same_state() -> None:
    x, y = quadratic_stream(20, 500)
    whole = model_of(channel(outlier_sd=6.0))
    whole.learn(x, y)
    parts = model_of(channel(outlier_sd=6.0))
    for a, b in [(0, 1), (1, 37), (37, 38), (38, 400), (400, 500)]:
        parts.learn(x[a:b], y[a:b])
    assert whole.to_state() == parts.to_state()


def test_with_settings_keeps_the_learned_curve_and_refuses_the_basis() -> None:
    x, y = quadratic_stream(21, 300)
    m = model_of(channel())
    m.learn(x, y)
    m2 = m.with_settings(channel_config({**m.config, "learner": {"kind": "rls"}, "drift": {"detector": "ewma"}}))
    assert np.array_equal(m2.weights, m.weights)
    assert m2.config["learner"]["kind"] == "rls" and m2.s.cov is not None
    with pytest.raises(ConfigError) as err:
        m.with_settings(channel_config({**m.config, "basis": {"kind": "poly", "degree": 3}}))
    assert err.value.field == "immutable"


def test_the_state_does_not_carry_the_config() -> None:
    """The configuration is kept once (the channel's); a state is the learned values only,
    and restoring it needs the configuration, which must fit it."""
    x, y = quadratic_stream(23, 200)
    m = model_of(channel(drift={"detector": "cusum", "tolerance": 0.5}))
    m.learn(x, y)
    state = json.loads(json.dumps(m.to_state()))
    assert "config" not in state and state["format"] == 4
    restored = ChannelModel.from_state(m.config, state)
    assert restored.config == m.config and restored.to_state() == m.to_state()
    with pytest.raises(StateError):  # 3 weights for a 4-term basis
        ChannelModel.from_state(channel_config(channel(basis={"kind": "poly", "degree": 3})), state)
    with pytest.raises(StateError):  # a state of the earlier format, config inside
        ChannelModel.from_state(m.config, {**state, "format": 1, "config": m.config})


def test_the_model_answers_by_name() -> None:
    """Counts, drift and tolerance by name, equal to the summary and to the learn results."""
    x, y = quadratic_stream(24, 400)
    m = model_of(channel(outlier_sd=6.0, drift={"detector": "cusum", "tolerance": 0.05}))
    m.fit_closed_form(x[:50], y[:50])
    y2 = y.copy()
    y2[100] += 10.0  # held back by the gate
    y2[300:] += 0.2  # a step (4 s.d.) the detector alarms on and the curve follows
    res = m.learn(x, y2)
    assert m.n_samples == 400
    assert m.n_accepted == res.accepted
    assert m.n_rejected == sum(1 for s in res.status if s != "accepted") > 0
    assert m.drift_state == res.drift_state[-1] == "alarm" and m.in_alarm
    assert m.drift_statistic == res.drift_statistic[-1]
    assert m.tolerance_state == "out_of_tolerance" and m.max_curve_change is not None
    assert m.max_curve_change == m.max_curve_difference(m.s.w_ref)
    assert m.warmed_up
    s = m.summary()
    assert (s["n_samples"], s["n_accepted"], s["n_rejected"], s["rmse"]) == (
        m.n_samples, m.n_accepted, m.n_rejected, m.rmse)
    assert s["drift"]["state"] == m.drift_state and s["drift"]["statistic"] == m.drift_statistic
    with pytest.raises(ValueError):
        m.weights[0] = 1.0  # read only: learning is the model's business


@pytest.mark.parametrize("learner", [{"kind": "sgd"}, {"kind": "rls", "forgetting": 0.99}])
@pytest.mark.parametrize("split", [0, 150, 301])
def test_the_state_before_the_alarm_is_that_of_learning_up_to_it(learner: dict[str, Any], split: int) -> None:
    """One pass keeps the state just before the sample that raised the drift alarm: equal to
    the state of a model that learned only the samples before it (whatever the batches),
    except for the curve, which is the one from before the estimated change point: the
    weights when the statistic that alarmed was last zero."""
    x, y = quadratic_stream(25, 600)
    y = y.copy()
    y[330:] += 1.5
    body = channel(learner=learner, outlier_sd=None, drift={"detector": "page_hinkley", "tolerance": 0.2})
    m = model_of(body)
    m.fit_closed_form(x[:40], y[:40])
    first = m.learn(x[:split], y[:split])
    assert first.alarm_index is None and first.before_alarm is None
    res = m.learn(x[split:], y[split:])
    assert res.alarm_index is not None and res.before_alarm is not None
    k = split + res.alarm_index  # the sample that raised the alarm
    assert res.drift_state[res.alarm_index] == "alarm" and "alarm" not in res.drift_state[:res.alarm_index]
    direct = model_of(body)
    direct.fit_closed_form(x[:40], y[:40])
    direct.learn(x[:k], y[:k])
    expected = direct.to_state()
    before = res.before_alarm
    side = 0  # the upward statistic alarms on an upward step
    assert before["weights"] == direct.s.change_w[side].tolist()
    assert before["change_weights"] == [before["weights"]] * 2
    differ = ("weights", "change_weights", "max_curve_change", "tolerance_state")
    assert {k: v for k, v in before.items() if k not in differ} == {
        k: v for k, v in expected.items() if k not in differ}
    assert before["n_samples"] == k
    # the change point lies before the step: that curve has not moved toward the fault
    change = direct.copy()
    change.s.w = np.array(before["weights"])
    assert change.max_curve_difference(direct.s.w_ref) < 0.05 < direct.max_curve_difference(direct.s.w_ref)
    # no alarm is raised twice: it stays until the drift watch restarts
    assert m.learn(x[:50], y[:50]).before_alarm is None


def test_detectors_and_gate_wait_for_the_warmup() -> None:
    # the residual s.d. estimate needs 30 accepted samples before it standardises anything
    x, y = quadratic_stream(22, 60)
    m = model_of(channel(outlier_sd=6.0))
    res = m.learn(x[:29], y[:29])
    assert np.all(res.drift_statistic == 0.0)
    assert not m.summary()["warmed_up"]
    res = m.learn(x[29:], y[29:])
    assert m.summary()["warmed_up"]
    assert res.drift_statistic[0] == 0.0 and np.any(res.drift_statistic[2:] > 0.0)


def test_the_state_before_an_alarm_raised_by_a_run_of_outliers_is_that_of_learning_up_to_it() -> None:
    """A step of 40 noise s.d. with the outlier gate on: the samples are held back as outliers
    and the watch takes them from the second of the run on. The running statistics kept for
    the alarm are those before the alarming sample, the run of outliers counted up to it."""
    x, y = quadratic_stream(26, 400)
    y = y.copy()
    y[300:] += 2.0
    body = channel(outlier_sd=6.0, drift={"detector": "page_hinkley"})
    m = model_of(body)
    m.fit_closed_form(x[:40], y[:40])
    res = m.learn(x, y)
    assert res.alarm_index is not None and res.before_alarm is not None
    k = res.alarm_index
    assert res.status[300] == "outlier" and k > 300
    direct = model_of(body)
    direct.fit_closed_form(x[:40], y[:40])
    direct.learn(x[:k], y[:k])
    assert res.before_alarm["running"] == direct.to_state()["running"]
    assert res.before_alarm["running"]["outlier_run"] == k - 300
