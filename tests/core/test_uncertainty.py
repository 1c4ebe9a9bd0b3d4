"""The uncertainty budget (service/curvekeeper/core/uncertainty.py) against sources
outside the project: the GUM (JCGM 100:2008) table G.2 and worked example H.1, quoted
from memory and marked so; scipy.stats.t for the Student t quantiles; hand arithmetic
done in this file; a seeded numpy simulation of a quantised reading."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from curvekeeper.core.uncertainty import (
    HALF_WIDTH_DIVISORS,
    Component,
    budget,
    coverage_factor,
    from_expanded,
    from_half_width,
    rectangular,
    welch_satterthwaite,
)
from scipy import stats

INF = math.inf

# GUM table G.2, t_p(nu) for p = 95 % and 99 %, as printed (two decimals; the nu = inf row
# three), quoted from memory; each value is also checked against scipy.stats.t.ppf below
TABLE_G2 = {
    # nu: (95 %, 99 %)
    1: (12.71, 63.66),
    2: (4.30, 9.92),
    3: (3.18, 5.84),
    5: (2.57, 4.03),
    8: (2.31, 3.36),
    10: (2.23, 3.17),
    20: (2.09, 2.85),
    50: (2.01, 2.68),
    INF: (1.960, 2.576),
}


@pytest.mark.parametrize("nu", list(TABLE_G2))
@pytest.mark.parametrize(("column", "p"), [(0, 0.95), (1, 0.99)])
def test_coverage_factor_matches_gum_table_g2(nu: float, column: int, p: float) -> None:
    k = coverage_factor(nu, p)
    printed = TABLE_G2[nu][column]
    half_digit = 0.5e-3 if nu == INF else 0.5e-2  # the table's rounding
    assert abs(k - printed) <= half_digit
    # the same quantile from scipy's t distribution (norm for nu = inf), two-sided
    exact = stats.norm.ppf(0.5 + p / 2) if nu == INF else stats.t.ppf(0.5 + p / 2, nu)
    assert k == pytest.approx(exact, rel=1e-10)


def test_coverage_factor_takes_arrays_and_keeps_nan() -> None:
    nus = np.array(list(TABLE_G2) + [math.nan])
    k = coverage_factor(nus, 0.95)
    assert k.shape == nus.shape
    np.testing.assert_allclose(k[:-1], [coverage_factor(v, 0.95) for v in TABLE_G2], rtol=0, atol=0)
    assert math.isnan(k[-1])


def test_coverage_factor_truncates_the_dof_to_the_next_lower_integer() -> None:
    """GUM G.4.1 note 1: a non-integer nu_eff is truncated (16.7 -> 16), never below 1."""
    assert coverage_factor(16.7, 0.95) == pytest.approx(stats.t.ppf(0.975, 16), rel=1e-12)
    assert coverage_factor(16.7, 0.95) != pytest.approx(stats.t.ppf(0.975, 16.7), rel=1e-6)
    assert coverage_factor(0.3, 0.95) == pytest.approx(12.706, abs=5e-4)  # nu 1 (table G.2: 12.71)
    with pytest.raises(ValueError, match="above 0"):
        coverage_factor(0.0)
    with pytest.raises(ValueError, match="coverage"):
        coverage_factor(5, 1.0)


def test_welch_satterthwaite_hand_example() -> None:
    """Worked by hand: column 0, u = 3 (nu 4) and 4 (exact): u_c = 5,
    nu_eff = 5^4 / (3^4 / 4) = 2500 / 81 = 30.86...; column 1, two equal contributions with
    nu 5 each: (2 u^2)^2 / (2 u^4 / 5) = 10; column 2, only the exact one contributes: inf;
    column 3, nothing contributes: inf."""
    contributions = np.array([[3.0, 2.0, 0.0, 0.0],
                              [4.0, 2.0, 4.0, 0.0]])
    nu = welch_satterthwaite(contributions, np.array([[4.0, 5.0, 2.0, 3.0],
                                                      [INF, 5.0, INF, 3.0]]))
    assert nu[0] == pytest.approx(2500 / 81, rel=1e-12)
    assert nu[1] == pytest.approx(10.0, rel=1e-12)
    assert nu[2] == INF and nu[3] == INF
    # (c,) dofs broadcast over the points; all exact gives inf
    assert welch_satterthwaite(contributions[:, :2], [INF, INF]).tolist() == [INF, INF]
    assert welch_satterthwaite([[3.0], [4.0]], [4.0, INF])[0] == pytest.approx(2500 / 81, rel=1e-12)
    # scaled internally: contributions of 1e100 do not overflow u^4
    assert welch_satterthwaite([[3e100], [4e100]], [4.0, INF])[0] == pytest.approx(2500 / 81, rel=1e-12)


def _gum_h1_components() -> list[Component]:
    """The budget of GUM example H.1 (end gauge, l = l_s + d - l_s (da th + a_s dth)),
    inputs quoted from memory; output in nm. The nu of d and of the two rectangular
    estimates are computed here from the GUM's own rules, which checks the memory."""
    ls = 50e6  # nm, nominal length of the standard
    theta = -0.1  # degC, deviation of the bed from 20 degC
    alpha_s = 11.5e-6  # 1/degC, the standard's expansion coefficient

    def reliability(rel: float) -> float:  # GUM eq. G.3: nu ~ 1/2 (du/u)^-2
        return 0.5 / rel**2

    # d: repeated comparisons (5.8 nm, nu 24), random (3.9 nm, nu 5) and systematic (6.7 nm,
    # nu 8) comparator effects; the GUM gives u(d) = 9.7 nm with nu 25
    d_parts = np.array([[5.8], [3.9], [6.7]])
    u_d = float(np.sqrt((d_parts**2).sum()))
    nu_d = float(welch_satterthwaite(d_parts, [24, 5, 8])[0])
    assert round(u_d, 1) == 9.7 and math.floor(nu_d) == 25
    return [
        # the certificate: U = 75 nm with k = 3, nu 18
        Component("standard's calibration", "B", "t", from_expanded(75.0, 3.0), 1.0, 18),
        Component("measured difference", "A", "t", u_d, 1.0, nu_d),
        # +-1e-6 /degC, reliable to 10 %: nu 50; c = -l_s theta
        Component("expansion coefficient difference", "B", "rectangular", rectangular(2e-6), -ls * theta,
                  reliability(0.10)),
        # +-0.05 degC, reliable to 50 %: nu 2; c = -l_s alpha_s = -575 nm/degC
        Component("temperature difference", "B", "rectangular", rectangular(0.1), -ls * alpha_s,
                  reliability(0.50)),
        # first-order sensitivities zero (their second-order terms, GUM H.1.7, are left out)
        Component("standard's expansion coefficient", "B", "rectangular", 1.2e-6, 0.0),
        Component("bed temperature", "B", "normal", 0.41, 0.0),
    ]


def test_budget_reproduces_gum_example_h1() -> None:
    """GUM H.1 (from memory): u_c = 32 nm, nu_eff = 16.7 truncated to 16, t_99(16) = 2.92 and
    U_99 = 2.92 x 32 nm = 93 nm (l = 50.000 838 mm +- 0.000 093 mm)."""
    b = budget(_gum_h1_components())
    assert round(float(b.u[0])) == 32
    assert 16.5 < b.dof[0] < 17.0 and math.floor(b.dof[0]) == 16
    U, k = b.expanded(coverage=0.99)
    assert round(float(k[0]), 2) == 2.92
    assert round(float(k[0]) * 32) == 93  # the GUM multiplies the rounded u_c
    rows = b.rows_at(0)
    assert [round(r["contribution"], 1) for r in rows] == [25.0, 9.7, 2.9, 16.6, 0.0, 0.0]
    assert rows[0]["dof"] == 18 and rows[-1]["dof"] is None  # inf -> null


def test_budget_combines_by_root_sum_of_squares_with_magnitudes() -> None:
    """GUM eq. 10 for uncorrelated inputs; a negative sensitivity counts by its magnitude."""
    b = budget([
        Component("fit", "A", "t", np.array([0.3, 0.6]), np.array([10.0, -10.0]), 12),
        Component("reference", "B", "normal", from_expanded(8.0, 2.0), 1.0),
    ])
    np.testing.assert_allclose(b.u, [5.0, math.hypot(6.0, 4.0)], rtol=1e-12)
    np.testing.assert_allclose(b.contribution, [[3.0, 6.0], [4.0, 4.0]], rtol=1e-12)
    assert b.dof[0] == pytest.approx(625 / (81 / 12), rel=1e-12)
    U, k = b.expanded(k=2.0)
    np.testing.assert_allclose(U, 2.0 * b.u, rtol=1e-12)
    np.testing.assert_array_equal(k, [2.0, 2.0])
    U, k = b.expanded(0.95)
    np.testing.assert_allclose(k, stats.t.ppf(0.975, np.floor(b.dof)), rtol=1e-10)
    point = b.to_dict(1)
    json.dumps(point, allow_nan=False)  # JSON-ready: no inf or NaN
    assert point["u"] == pytest.approx(math.hypot(6.0, 4.0)) and point["dof"] > 0
    assert point["rows"][0] == {"source": "fit", "type": "A", "distribution": "t", "u": 0.6,
                                "sensitivity": -10.0, "contribution": 6.0, "dof": 12.0}
    assert point["rows"][1]["dof"] is None


def test_budget_refuses_what_it_cannot_mean() -> None:
    with pytest.raises(ValueError, match="type"):
        Component("x", "C", "normal", 1.0)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="distribution"):
        Component("x", "A", "trapezoidal", 1.0)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="at least one"):
        budget([])
    with pytest.raises(ValueError, match="negative"):
        budget([Component("x", "A", "normal", -1.0)])


def test_rectangular_matches_a_simulated_quantisation_error() -> None:
    """A reading rounded to a step q has an error uniform on +-q/2 with s.d. q / sqrt(12)
    (GUM 4.3.7). Seeded simulation, 10^5 draws: the relative s.e. of a sample s.d. of a
    uniform error is sqrt(0.8 / n) / 2 = 0.14 %; tolerance 1 % (about 7 s.e.)."""
    q = 0.1
    x = np.random.default_rng(20240611).uniform(0.0, 1000.0, 100_000)
    err = q * np.round(x / q) - x
    assert np.abs(err).max() <= q / 2 * (1 + 1e-9)
    assert rectangular(q) == pytest.approx(err.std(), rel=0.01)
    np.testing.assert_allclose(rectangular(np.array([q, 2 * q])), [q, 2 * q] / np.sqrt(12.0), rtol=1e-12)


def test_from_expanded_divides_by_k() -> None:
    assert from_expanded(0.075, 3.0) == pytest.approx(0.025, rel=1e-12)  # GUM H.1's certificate
    with pytest.raises(ValueError, match="positive"):
        from_expanded(1.0, 0.0)


def test_from_half_width_by_the_gum_and_scipy() -> None:
    """GUM 4.3.7: limits +-a with a rectangular distribution give u = a / sqrt 3; GUM 4.3.9: a
    triangular (symmetric) one u = a / sqrt 6. Worked by hand for a = 0.3: sqrt 3 / 10 =
    0.17320508...; for a = 0.6: sqrt 6 / 10 = 0.24494897... Checked too against scipy's
    standard deviations of the same distributions on [-a, a]."""
    assert from_half_width(0.3, "rectangular") == pytest.approx(0.17320508075688772, rel=1e-14)
    assert from_half_width(0.6, "triangular") == pytest.approx(0.24494897427831781, rel=1e-14)
    for a in (0.01, 0.3, 2.5):
        assert from_half_width(a, "rectangular") == pytest.approx(stats.uniform(-a, 2 * a).std(), rel=1e-12)
        assert from_half_width(a, "triangular") == pytest.approx(stats.triang(0.5, -a, 2 * a).std(), rel=1e-12)
    assert HALF_WIDTH_DIVISORS["rectangular"] ** 2 == pytest.approx(3.0, rel=1e-15)
    with pytest.raises(ValueError, match="distribution"):
        from_half_width(0.1, "normal")
