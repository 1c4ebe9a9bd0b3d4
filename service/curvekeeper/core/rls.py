"""Recursive least squares: exact initialisation and a covariance that cannot wind up.

The step, with forgetting factor lambda, for a row phi (M,) and prior residual r::

    k = P phi / (lambda + phi' P phi);  w <- w + k r;  P <- (P - k phi' P) / lambda_eff

**Exact initialisation.** Until the rows seen so far determine every weight, the
learner keeps the information form A = sum lambda^(n-i) phi_i phi_i' and
b = sum lambda^(n-i) phi_i z_i; once A is positive definite (a Cholesky factor
with no pivot below ``RANK_TOL`` times the largest diagonal), P = A^-1 and
w = P b, the least-squares solution of those rows. No prior P0 = c I enters, so
with lambda = 1 the recursion gives the closed-form least-squares weights of all
rows, to rounding (exact initialisation of RLS, as in Haykin's Adaptive Filter
Theory; other texts call it "initialisation by the first M samples").

**Bounded covariance.** With lambda < 1 and an input that does not move (a cold room
at a steady temperature), P / lambda grows without limit in the directions the input
does not excite (covariance windup) until it overflows, while in the excited
direction it shrinks. Here, after the EFRA idea (exponential forgetting and
resetting, Salgado, Goodwin and Middleton, 1988; cited from memory):

    P <- (P - k phi' P) / lambda_eff + beta I,   beta = (1 - lambda)^2

with lambda_eff = lambda while the trace stays under the bound T_max, and larger (at
most 1) as far as needed to keep trace(P) <= T_max. The floor beta I keeps the gain
alive in every direction (under a constant row, the excited direction settles near
p = (1 - lambda) / |phi| instead of shrinking as 1/n, so the memory stays about
1 / (1 - lambda) samples); the trace cap takes the place of EFRA's -delta P^2 term.
T_max is ``covariance_bound`` times trace(P) right after the last calibration or
initialisation. With lambda = 1, beta = 0 and the step is plain RLS.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .jit import kernel

RANK_TOL = 1e-10  # smallest Cholesky pivot, relative to the largest diagonal of A


@kernel
def rls_step(w: Any, P: Any, phi: Any, r: float, lam: float, tr_max: float, Pphi: Any, wn: Any) -> bool:
    """One RLS step on w (M,), P (M, M) in place; False (nothing changed) when unstable."""
    M = w.shape[0]
    den = lam
    big = 0.0
    for i in range(M):
        acc = 0.0
        for j in range(M):
            acc += P[i, j] * phi[j]
        Pphi[i] = acc
        den += phi[i] * acc
        if abs(acc) > big:
            big = abs(acc)
    if not (den > 0.0) or not math.isfinite(den) or not math.isfinite(big * big / den):
        return False
    for i in range(M):
        v = w[i] + Pphi[i] / den * r
        if not math.isfinite(v):
            return False
        wn[i] = v
    trace = 0.0
    for i in range(M):
        trace += P[i, i] - Pphi[i] * Pphi[i] / den
    beta = (1.0 - lam) * (1.0 - lam)
    lam_eff = lam
    if tr_max > 0.0:
        room = tr_max - M * beta
        if trace > lam * room:
            lam_eff = trace / room if room > 0.0 and trace < room else 1.0
        if trace / lam_eff + M * beta > tr_max:
            beta = max(0.0, (tr_max - trace / lam_eff) / M)
    for i in range(M):
        ki = Pphi[i] / den
        for j in range(i, M):
            v = (P[i, j] - ki * Pphi[j]) / lam_eff
            P[i, j] = v
            P[j, i] = v
        P[i, i] += beta
    for i in range(M):
        w[i] = wn[i]
    return True


@kernel
def info_step(A: Any, b: Any, phi: Any, z: float, lam: float) -> bool:
    """Add a row to the information form A (M, M), b (M,) with forgetting; False when the
    row would make it non-finite (nothing changed)."""
    M = b.shape[0]
    for i in range(M):
        if not math.isfinite(lam * b[i] + phi[i] * z):
            return False
        for j in range(M):
            if not math.isfinite(lam * A[i, j] + phi[i] * phi[j]):
                return False
    for i in range(M):
        b[i] = lam * b[i] + phi[i] * z
        for j in range(M):
            A[i, j] = lam * A[i, j] + phi[i] * phi[j]
    return True


@kernel
def info_solve(A: Any, b: Any, w: Any, L: Any) -> bool:
    """When A (M, M) is positive definite and its solution finite: overwrite A with
    P = A^-1 and w with P b, and return True; otherwise change nothing (but the scratch
    L (M, M)) and return False."""
    M = b.shape[0]
    top = 0.0
    for i in range(M):
        if A[i, i] > top:
            top = A[i, i]
    if not (top > 0.0):
        return False
    for j in range(M):
        d = A[j, j]
        for k in range(j):
            d -= L[j, k] * L[j, k]
        if not (d > RANK_TOL * top):
            return False
        L[j, j] = math.sqrt(d)
        for i in range(j + 1, M):
            s = A[i, j]
            for k in range(j):
                s -= L[i, k] * L[j, k]
            L[i, j] = s / L[j, j]
    # inverse of L (lower triangular), then P = L^-T L^-1
    Li = np.zeros((M, M))
    for i in range(M):
        Li[i, i] = 1.0 / L[i, i]
        for j in range(i):
            s = 0.0
            for k in range(j, i):
                s -= L[i, k] * Li[k, j]
            Li[i, j] = s / L[i, i]
    P = np.empty((M, M))
    for i in range(M):
        for j in range(i, M):
            s = 0.0
            for k in range(j, M):
                s += Li[k, i] * Li[k, j]
            if not math.isfinite(s):
                return False
            P[i, j] = s
            P[j, i] = s
    wn = np.empty(M)
    for i in range(M):
        s = 0.0
        for j in range(M):
            s += P[i, j] * b[j]
        if not math.isfinite(s):
            return False
        wn[i] = s
    A[:, :] = P
    w[:] = wn
    return True
