"""Closed-form least squares by singular value decomposition.

Phi = U diag(S) V' gives w = V diag(1/S) U' z and the unscaled covariance
(Phi' Phi)^-1 = V diag(1/S^2) V' without ever forming or inverting Phi' Phi,
so the fit keeps the accuracy the data allow (cond(Phi), not cond(Phi)^2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .errors import FitError

Array = NDArray[np.float64]


@dataclass(frozen=True)
class LeastSquaresFit:
    """weights (M,); cov_unscaled (M, M) = (Phi' Phi)^-1; residual_sd (NaN when n == M);
    r_squared (centred with an intercept, uncentred without); n points; dof = n - M."""

    weights: Array
    cov_unscaled: Array
    residuals: Array
    residual_sd: float
    r_squared: float
    n: int
    dof: int

    @property
    def weight_sd(self) -> Array:
        """(M,) standard deviations of the weights (NaN when dof == 0)."""
        return np.asarray(self.residual_sd * np.sqrt(np.diag(self.cov_unscaled)))


def fit_least_squares(Phi: Array, z: Array, *, has_intercept: bool) -> LeastSquaresFit:
    """Least-squares fit of z (n,) on Phi (n, M); raises ``FitError`` when rank deficient."""
    n, M = Phi.shape
    if n < M:
        raise FitError(
            f"a fit of {M} curve terms needs at least {M} points, got {n}",
            details={"n": n, "terms": M},
        )
    U, S, Vt = np.linalg.svd(Phi, full_matrices=False)
    if S.size == 0 or not S[-1] > S[0] * max(n, M) * np.finfo(np.float64).eps:
        raise FitError(
            "the points do not determine the curve (too few distinct input values for the basis)",
            details={"n": n, "terms": M},
        )
    w = Vt.T @ ((U.T @ z) / S)
    cov = (Vt.T / (S * S)) @ Vt
    cov = 0.5 * (cov + cov.T)
    resid = z - Phi @ w
    ssr = float(resid @ resid)
    dof = n - M
    sd = float(np.sqrt(ssr / dof)) if dof > 0 else float("nan")
    if has_intercept:
        zc = z - z.mean()
        sst = float(zc @ zc)
    else:
        sst = float(z @ z)
    r2 = 1.0 - ssr / sst if sst > 0 else float("nan")
    return LeastSquaresFit(w, cov, resid, sd, r2, n, dof)
