"""Basis expansions against numpy.polynomial (Chebyshev and power series)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from curvekeeper.core.basis import HingeBasis, PolyBasis, RBFBasis, make_basis, total_degree_terms
from curvekeeper.core.scaling import InputScaler
from numpy.polynomial import chebyshev as C


def scaler(*ranges: tuple[float, float]) -> InputScaler:
    return InputScaler([{"min": lo, "max": hi} for lo, hi in ranges])


def test_scaling_maps_the_declared_range_to_minus_one_one() -> None:
    sc = scaler((1000.0, 40000.0))
    s = sc.scale(np.array([[1000.0], [20500.0], [40000.0], [50000.0]]))
    np.testing.assert_allclose(s[:, 0], [-1, 0, 1, (50000 - 20500) / 19500], rtol=1e-15, atol=1e-15)
    assert sc.out_of_range(np.array([[999.0], [1000.0], [40001.0]])).tolist() == [True, False, True]


def test_single_input_poly_is_numpy_chebvander() -> None:
    sc = scaler((-3.0, 7.0))
    x = np.linspace(-3, 7, 41).reshape(-1, 1)
    Phi = PolyBasis(sc, 6, True).expand(x)
    np.testing.assert_allclose(Phi, C.chebvander(sc.scale(x)[:, 0], 6), atol=1e-14)


def test_multi_input_terms_are_all_of_total_degree_at_most_d() -> None:
    terms = total_degree_terms(3, 4)
    assert len(terms) == math.comb(4 + 3, 3)
    assert len(set(terms)) == len(terms) and all(sum(t) <= 4 for t in terms)
    sc = scaler((0.0, 1.0), (10.0, 20.0))
    b = PolyBasis(sc, 2, True)
    X = np.array([[0.3, 12.0], [0.9, 19.0]])
    S = sc.scale(X)
    Phi = b.expand(X)
    for j, (a1, a2) in enumerate(b.terms):
        expect = C.chebval(S[:, 0], np.eye(3)[a1]) * C.chebval(S[:, 1], np.eye(3)[a2])
        np.testing.assert_allclose(Phi[:, j], expect, atol=1e-14)


@pytest.mark.parametrize("degree", [1, 2, 5, 9])
def test_raw_map_gives_the_power_series(degree: int) -> None:
    sc = scaler((2.0, 11.0))
    b = PolyBasis(sc, degree, True)
    w = np.random.default_rng(degree).normal(size=b.size)
    x = np.linspace(2, 11, 30)
    y_basis = b.expand(x.reshape(-1, 1)) @ w
    c = b.raw_map() @ w
    y_power = np.polynomial.polynomial.polyval(x, c)
    # a power series loses digits to cancellation: allow rounding of its largest term
    bound = 1e-13 * np.polynomial.polynomial.polyval(11.0, np.abs(c))
    np.testing.assert_allclose(y_power, y_basis, rtol=0, atol=max(bound, 1e-12))


def test_multi_input_raw_map_gives_the_monomials() -> None:
    sc = scaler((0.0, 4.0), (-1.0, 3.0))
    b = PolyBasis(sc, 3, True)
    w = np.random.default_rng(1).normal(size=b.size)
    c = b.raw_map() @ w
    X = np.random.default_rng(2).uniform([0, -1], [4, 3], (20, 2))
    mono = np.array([[x1**e1 * x2**e2 for e1, e2 in b.raw_terms()] for x1, x2 in X])
    np.testing.assert_allclose(mono @ c, b.expand(X) @ w, rtol=1e-10, atol=1e-10)


def test_zero_intercept_curve_passes_through_the_raw_origin() -> None:
    sc = scaler((5.0, 50.0))
    b = PolyBasis(sc, 3, False)
    assert b.size == 3
    w = np.array([0.7, -0.2, 0.05])
    assert abs((b.expand(np.array([[0.0]])) @ w)[0]) < 1e-15
    assert b.raw_map()[0].tolist() == [0.0, 0.0, 0.0]


def test_hinge_is_continuous_and_piecewise_linear() -> None:
    sc = scaler((0.0, 10.0))
    b = HingeBasis(sc, [3.0, 7.0], True)
    w = np.array([1.0, 0.5, -2.0, 3.0])
    x = np.linspace(0, 10, 1001).reshape(-1, 1)
    y = b.expand(x) @ w
    slopes = np.diff(y) / np.diff(x[:, 0])
    # three linear pieces: slopes change only at the knots
    assert len(np.unique(np.round(slopes, 9))) == 3
    assert np.max(np.abs(np.diff(y))) < 0.02


def test_rbf_bumps_peak_at_their_centres() -> None:
    sc = scaler((0.0, 10.0))
    b = RBFBasis(sc, [[2.0], [5.0], [8.0]], 0.3, True)
    Phi = b.expand(np.array([[2.0], [5.0], [8.0]]))
    np.testing.assert_allclose(Phi[:, 0], 1.0)
    np.testing.assert_allclose(np.diag(Phi[:, 1:]), 1.0)
    # scaled distance between neighbouring centres is 0.6: exp(-0.36 / (2 * 0.09))
    assert Phi[0, 2] == pytest.approx(math.exp(-0.36 / 0.18))


def test_log_poly_columns_are_scaled_powers_of_ln_x() -> None:
    sc = scaler((300.0, 40000.0))
    b = make_basis({"kind": "log_poly", "powers": [0, 1, 3]}, sc)
    x = np.array([[300.0], [10000.0], [40000.0]])
    Phi = b.expand(x)
    u = np.log(x[:, 0])
    np.testing.assert_allclose(Phi @ np.diag(b.col_scale), np.column_stack([u**0, u, u**3]),
                               rtol=1e-14)
    assert np.max(np.abs(Phi)) <= 1.0 + 1e-15
