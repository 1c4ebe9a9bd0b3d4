"""The forecast (service/curvekeeper/core/forecast.py) against sources outside the project:
scipy.stats.linregress for the ordinary line and its standard errors, numpy.polyfit and
scipy.optimize.curve_fit (sigma given, absolute_sigma=False) for the weighted line and its
scaled covariance, the AR(1) effective sample size n (1 - r1) / (1 + r1) with r1 raised by
Marriott and Pope's bias (1 + 3 r1) / n, worked in this file (common practice for trend
standard errors), and a seeded simulation of the interval's coverage."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from curvekeeper.core.forecast import DAY_S, HORIZON_DAYS, crossing, fit_trend, forecast
from scipy import optimize, stats

T0 = datetime(2026, 3, 1, tzinfo=UTC).timestamp()


def days(n: int, step: float = 1.0) -> np.ndarray:
    return T0 + np.arange(n) * step * DAY_S


def test_the_unweighted_line_is_scipys_linregress() -> None:
    """Alternating noise: lag-1 autocorrelation below zero, so no widening, and the
    standard errors are linregress's own."""
    t = days(40)
    tau = (t - t.max()) / DAY_S
    rng = np.random.default_rng(5)
    d = 0.2 + 0.01 * tau + 0.02 * rng.uniform(0.5, 1.0, 40) * (-1.0) ** np.arange(40)
    tr = fit_trend(t, d)
    ref = stats.linregress(tau, d)
    assert tr.r1 == 0.0 and tr.dof == 38
    assert tr.b == pytest.approx(ref.slope, rel=1e-10)
    assert tr.a == pytest.approx(ref.intercept, rel=1e-10)
    assert np.sqrt(tr.cov[1, 1]) == pytest.approx(ref.stderr, rel=1e-9)
    assert np.sqrt(tr.cov[0, 0]) == pytest.approx(ref.intercept_stderr, rel=1e-9)
    # one more point at day 20 ahead: s sqrt(1 + 1/n + (x0 - mean)^2 / Sxx), the textbook
    # prediction standard error of a straight line (Draper and Smith, quoted from memory)
    res = d - (ref.intercept + ref.slope * tau)
    s_ = np.sqrt(res @ res / 38)
    x0 = 20.0
    assert tr.band(x0) == pytest.approx(
        s_ * np.sqrt(1 + 1 / 40 + (x0 - tau.mean()) ** 2 / ((tau - tau.mean()) ** 2).sum()), rel=1e-9)


def test_the_weighted_line_is_numpys_polyfit_and_scipys_curve_fit() -> None:
    rng = np.random.default_rng(6)
    t = np.sort(T0 + rng.uniform(0, 60, 30) * DAY_S)
    tau = (t - t.max()) / DAY_S
    u = rng.uniform(0.005, 0.05, 30)
    d = 0.3 + 0.004 * tau + u * rng.standard_normal(30)
    tr = fit_trend(t, d, u)
    slope, intercept = np.polyfit(tau, d, 1, w=1.0 / u)  # numpy weights are 1 / sigma
    assert (tr.b, tr.a) == pytest.approx((slope, intercept), rel=1e-9)
    popt, pcov = optimize.curve_fit(lambda x, a, b: a + b * x, tau, d, sigma=u, absolute_sigma=False)
    n_eff = 30 * (1 - tr.r1) / (1 + tr.r1)
    widening = 28 / max(n_eff - 2, 1.0)
    assert tr.cov == pytest.approx(pcov * widening, rel=1e-7)
    assert popt == pytest.approx([tr.a, tr.b], rel=1e-7)


def test_autocorrelated_residuals_widen_the_standard_errors_by_the_effective_sample_size() -> None:
    """AR(1) noise with phi = 0.8: r1 by hand (plus its bias), the variance scaled by
    (n - 2) / (n_eff - 2)."""
    rng = np.random.default_rng(7)
    n = 200
    e = np.zeros(n)
    for i in range(1, n):
        e[i] = 0.8 * e[i - 1] + 0.01 * rng.standard_normal()
    t = days(n, 0.5)
    tau = (t - t.max()) / DAY_S
    d = 0.1 + 0.002 * tau + e
    tr = fit_trend(t, d)
    ref = stats.linregress(tau, d)
    res = d - (ref.intercept + ref.slope * tau)
    r1 = float(res[:-1] @ res[1:] / (res @ res))
    r1 += (1 + 3 * r1) / n
    assert tr.r1 == pytest.approx(r1, rel=1e-9) and 0.6 < r1 < 0.95
    n_eff = n * (1 - r1) / (1 + r1)
    assert tr.dof == pytest.approx(n_eff - 2)
    assert tr.cov[1, 1] == pytest.approx(ref.stderr**2 * (n - 2) / (n_eff - 2), rel=1e-9)


def test_the_interval_ends_are_where_the_band_meets_the_tolerance() -> None:
    rng = np.random.default_rng(8)
    t = days(30)
    d = 0.1 + 0.01 * np.arange(30) + 0.01 * rng.standard_normal(30)
    tr = fit_trend(t, d)
    point, low, high = crossing(tr, 0.8)
    assert point is not None and low is not None and high is not None
    assert tr.a + tr.b * point == pytest.approx(0.8)
    q = stats.t.ppf(0.975, int(tr.dof))  # k from Student's t, truncated dof (GUM G.4.1 note)
    assert tr.a + tr.b * low + q * tr.band(low) == pytest.approx(0.8)
    assert tr.a + tr.b * high - q * tr.band(high) == pytest.approx(0.8)
    assert low < point < high


def test_the_interval_covers_the_true_crossing_in_about_95_percent_of_seeded_ramps() -> None:
    """400 ramps (0.01 per day for 40 days, AR(1) noise phi = 0.5, s.d. 0.02), tolerance
    0.8, true crossing day 70 from the start; the AR(1) adjustment is approximate, so the
    bound is loose (0.87 to 0.99; without the adjustment it covers about 0.8)."""
    hits = []
    for i in range(400):
        rng = np.random.default_rng([9, i])
        e = np.zeros(40)
        e[0] = 0.02 * rng.standard_normal()
        for j in range(1, 40):
            e[j] = 0.5 * e[j - 1] + 0.02 * np.sqrt(1 - 0.25) * rng.standard_normal()
        t = days(40)
        d = 0.1 + 0.01 * np.arange(40) + e
        f = forecast(t, d, None, 0.8)
        assert f is not None and f["low"] is not None  # high None: the data bound no later end
        true = datetime.fromtimestamp(T0, UTC) + timedelta(days=70)
        hits.append(f["low"] <= true and (f["high"] is None or true <= f["high"]))
    assert 0.87 <= np.mean(hits) <= 0.99, np.mean(hits)


def test_a_stable_channel_is_not_expected_to_leave_within_the_horizon() -> None:
    rng = np.random.default_rng(10)
    t = days(60)
    d = 0.05 + 0.005 * rng.standard_normal(60)
    f = forecast(t, d, np.full(60, 0.01), 0.5)
    assert f is not None
    assert f["not_within_days"] == HORIZON_DAYS
    assert f["leaves_tolerance_on"] is None and f["low"] is None and f["high"] is None
    assert abs(f["rate"]) < 1e-3 and "least-squares" in f["method"] and f["n_points"] == 60


def test_a_ramp_gives_dates_and_no_horizon_statement() -> None:
    t = days(20)
    d = 0.1 + 0.01 * np.arange(20) + 0.001 * (-1.0) ** np.arange(20)
    f = forecast(t, d, None, 0.5)
    assert f is not None and f["not_within_days"] is None
    expected = datetime.fromtimestamp(T0, UTC) + timedelta(days=40)  # 0.1 + 0.01 * 40 = 0.5
    assert abs((f["leaves_tolerance_on"] - expected).total_seconds()) < 0.5 * DAY_S
    assert f["low"] < f["leaves_tolerance_on"] < f["high"]
    assert f["rate"] == pytest.approx(0.01, rel=0.01)


@pytest.mark.parametrize(("t", "tol"), [(days(4), 0.5), (np.full(6, T0), 0.5), (days(10), None)])
def test_no_forecast_without_enough_points_times_or_a_tolerance(t: np.ndarray, tol: float | None) -> None:
    assert forecast(t, np.linspace(0, 0.1, t.size), None, tol) is None
