"""Basis expansions phi(x): raw inputs (n, d) -> design matrix Phi (n, M).

Kinds: ``poly`` (Chebyshev polynomials of the scaled inputs, all terms of total
degree <= degree), ``rbf`` (Gaussian bumps on the scaled inputs), ``log_poly``
(powers of ln x, the thermistor form) and ``hinge`` (piecewise linear).

Where the curve has a plain form in raw units (``poly``, ``log_poly``),
``raw_map()`` gives the matrix T with raw coefficients c = T @ w, so their
covariance is T C T^T.
"""

from __future__ import annotations

import functools
import itertools
from abc import ABC, abstractmethod
from typing import Any

import numpy as np
from numpy.polynomial import Chebyshev, Polynomial
from numpy.typing import NDArray

from .errors import InputError
from .scaling import InputScaler

Array = NDArray[np.float64]


class Basis(ABC):
    """Common face of the basis kinds."""

    size: int
    has_intercept: bool

    def __init__(self, scaler: InputScaler) -> None:
        self.scaler = scaler

    @abstractmethod
    def expand(self, X: Array) -> Array:
        """Raw inputs (n, d), already checked -> Phi (n, M), C-contiguous."""

    def raw_map(self) -> Array | None:
        """(K, M) map from weights to raw-unit coefficients, or None when there is none."""
        return None

    def raw_terms(self) -> list[Any]:
        """Labels of the raw coefficients (exponents), in the order of ``raw_map`` rows."""
        return []


def term_name(term: Any, names: list[str]) -> str:
    """A raw term as people write it, from ``raw_terms``: an exponent list per input
    (``1``, ``raw``, ``raw^2``, ``current*temperature``) or a power of ln x for log_poly
    (an int: ``1``, ``ln(raw)``, ``ln(raw)^3``); ``names`` the inputs' names in order."""
    if isinstance(term, list):
        parts = [n if e == 1 else f"{n}^{e}" for n, e in zip(names, term, strict=True) if e]
        return "*".join(parts) or "1"
    return "1" if term == 0 else f"ln({names[0]})" if term == 1 else f"ln({names[0]})^{term}"


def _chebyshev_columns(s: Array, degree: int) -> list[Array]:
    """T_0(s) ... T_degree(s) by the three-term recurrence, each (n,)."""
    cols = [np.ones_like(s)]
    if degree >= 1:
        cols.append(s.copy())
    for _ in range(2, degree + 1):
        cols.append(2.0 * s * cols[-1] - cols[-2])
    return cols


def total_degree_terms(d: int, degree: int) -> list[tuple[int, ...]]:
    """Multi-indices of total degree <= degree, graded, each degree in descending lex order."""
    terms: list[tuple[int, ...]] = []
    for total in range(degree + 1):
        level = [t for t in itertools.product(range(total + 1), repeat=d) if sum(t) == total]
        terms.extend(sorted(level, reverse=True))
    return terms


@functools.lru_cache(maxsize=256)
def _poly_raw_map(lo: tuple[float, ...], hi: tuple[float, ...], degree: int, terms: tuple[tuple[int, ...], ...],
                  intercept: bool) -> Array:
    """The poly basis' raw map (read-only; cached: building it costs about 10 ms at degree 15,
    more than a closed-form fit of 10,000 samples)."""
    d = len(lo)
    # U[i][k] = power-series coefficients in raw x_i of T_k(a_i x_i + b_i)
    U = []
    for i in range(d):
        rows = []
        for k in range(degree + 1):
            coef = Chebyshev.basis(k, domain=[lo[i], hi[i]]).convert(kind=Polynomial).coef
            rows.append(np.pad(coef, (0, degree + 1 - coef.size)))
        U.append(np.array(rows))
    monomials = total_degree_terms(d, degree)
    T = np.zeros((len(monomials), len(terms)))
    for j, term in enumerate(terms):
        for r, mono in enumerate(monomials):
            if any(m > t for m, t in zip(mono, term, strict=True)):
                continue
            T[r, j] = np.prod([U[i][term[i]][mono[i]] for i in range(d)])
    if not intercept:
        T[0, :] = 0.0  # T_k(s(x)) - T_k(s(0)) has no constant term
    T.setflags(write=False)
    return T


class PolyBasis(Basis):
    """Products of Chebyshev polynomials T_k of each scaled input s = a x + b.

    ``intercept=False`` (one input) uses T_k(s) - T_k(s(0)), k >= 1, so the
    curve passes through the origin in raw units.
    """

    def __init__(self, scaler: InputScaler, degree: int, intercept: bool) -> None:
        super().__init__(scaler)
        self.degree = degree
        self.intercept = intercept
        self.has_intercept = intercept
        terms = total_degree_terms(scaler.d, degree)
        self.terms = terms if intercept else terms[1:]
        self.size = len(self.terms)
        self._origin = _chebyshev_columns(np.array([scaler.b[0]]), degree) if not intercept else None

    def expand(self, X: Array) -> Array:
        S = self.scaler.scale(X)
        per_input = [_chebyshev_columns(S[:, i], self.degree) for i in range(S.shape[1])]
        Phi = np.empty((X.shape[0], self.size))
        for j, term in enumerate(self.terms):
            col = per_input[0][term[0]]
            for i in range(1, len(term)):
                col = col * per_input[i][term[i]]
            if self._origin is not None:
                col = col - self._origin[term[0]][0]
            Phi[:, j] = col
        return Phi

    def raw_map(self) -> Array:
        sc = self.scaler
        return _poly_raw_map(tuple(float(v) for v in sc.lo), tuple(float(v) for v in sc.hi), self.degree,
                             tuple(self.terms), self.intercept)

    def raw_terms(self) -> list[Any]:
        return [list(t) for t in total_degree_terms(self.scaler.d, self.degree)]


class RBFBasis(Basis):
    """Gaussian bumps exp(-|s - c|^2 / (2 width^2)) on scaled inputs, plus an optional constant.

    ``centers`` are in raw input units; ``width`` in scaled units (the range spans 2).
    """

    def __init__(self, scaler: InputScaler, centers: list[list[float]], width: float, intercept: bool) -> None:
        super().__init__(scaler)
        self.centers = scaler.scale(np.array(centers, dtype=np.float64))
        self.width = width
        self.intercept = intercept
        self.has_intercept = intercept
        self.size = len(centers) + (1 if intercept else 0)

    def expand(self, X: Array) -> Array:
        S = self.scaler.scale(X)
        d2 = ((S[:, None, :] - self.centers[None, :, :]) ** 2).sum(axis=2)
        bumps = np.exp(-d2 / (2.0 * self.width * self.width))
        if self.intercept:
            return np.ascontiguousarray(np.hstack([np.ones((X.shape[0], 1)), bumps]))
        return np.ascontiguousarray(bumps)


class LogPolyBasis(Basis):
    """Powers of u = ln x, each column divided by its largest magnitude over the range.

    The column scaling keeps learning rates unit-free without changing the
    curve's form, so raw coefficients (e.g. Steinhart-Hart A, B, C) are w / scale.
    """

    def __init__(self, scaler: InputScaler, powers: list[int]) -> None:
        super().__init__(scaler)
        self.powers = list(powers)
        lo, hi = float(scaler.lo[0]), float(scaler.hi[0])
        umax = max(abs(np.log(lo)), abs(np.log(hi)))
        self.col_scale = np.array([umax**p if p > 0 and umax > 0 else 1.0 for p in self.powers])
        self.has_intercept = 0 in self.powers
        self.size = len(self.powers)

    def expand(self, X: Array) -> Array:
        x = X[:, 0]
        if not (x > 0).all():
            i = int(np.argmax(~(x > 0)))
            raise InputError(
                f"input value at position {i} is not above zero, which ln x needs",
                field="x",
                details={"index": i},
            )
        u = np.log(x)
        Phi = np.empty((X.shape[0], self.size))
        for j, p in enumerate(self.powers):
            Phi[:, j] = u**p / self.col_scale[j]
        return Phi

    def raw_map(self) -> Array:
        return np.diag(1.0 / self.col_scale)

    def raw_terms(self) -> list[Any]:
        return list(self.powers)


class HingeBasis(Basis):
    """Piecewise-linear: [1], s, max(0, s - s_k) for each knot (knots in raw units)."""

    def __init__(self, scaler: InputScaler, knots: list[float], intercept: bool) -> None:
        super().__init__(scaler)
        self.knots = scaler.scale(np.array(knots, dtype=np.float64).reshape(-1, 1))[:, 0]
        self.intercept = intercept
        self.has_intercept = intercept
        self.size = len(knots) + 1 + (1 if intercept else 0)

    def expand(self, X: Array) -> Array:
        s = self.scaler.scale(X)[:, 0]
        cols = [s] + [np.maximum(0.0, s - k) for k in self.knots]
        if self.intercept:
            cols.insert(0, np.ones_like(s))
        return np.ascontiguousarray(np.stack(cols, axis=1))


def make_basis(cfg: dict[str, Any], scaler: InputScaler) -> Basis:
    """Build the basis of a normalised ``basis`` config."""
    kind = cfg["kind"]
    if kind == "poly":
        return PolyBasis(scaler, cfg["degree"], cfg["intercept"])
    if kind == "rbf":
        return RBFBasis(scaler, cfg["centers"], cfg["width"], cfg["intercept"])
    if kind == "log_poly":
        return LogPolyBasis(scaler, cfg["powers"])
    return HingeBasis(scaler, cfg["knots"], cfg["intercept"])
