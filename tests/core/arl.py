"""Average run lengths by the Markov-chain method of Brook and Evans (1972).

Brook, D. and Evans, D. A. (1972), "An approach to the probability distribution of
cusum run length", Biometrika 59, 539-548: the statistic's in-control region is cut
into m intervals, each represented by its midpoint; P[i, j] is the probability of a
step from midpoint i into interval j; the ARL vector solves (I - P) ARL = 1 and the
zero-state ARL is its entry at the start state. Plain numpy / scipy, no project code.

Every function takes a normal shift ``mu`` (in s.d.) and an optional symmetric clip
``clip`` (0: off): the observation is Z = min(max(N(mu, 1), -clip), clip), which has
atoms of probability at +-clip. Intervals are half-open [lo, hi), so a probability
is P(Z < hi) - P(Z < lo) with the left-continuous cdf ``cdf_below``.

Run length convention: samples up to and including the first one that signals
(statistic strictly above the threshold), from the zero state.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import sparse
from scipy.sparse.linalg import spsolve
from scipy.stats import norm
from threadpoolctl import threadpool_limits


def cdf_below(x: np.ndarray | float, mu: float, clip: float = 0.0) -> np.ndarray:
    """P(Z < x) for Z = N(mu, 1) clipped at +-clip (clip 0: not clipped)."""
    x = np.asarray(x, dtype=float)
    p = norm.cdf(x - mu)
    if clip > 0.0:
        p = np.where(x <= -clip, 0.0, np.where(x > clip, 1.0, p))
    return p


def solve_arl(P: np.ndarray) -> np.ndarray:
    """ARL from every state: (I - P) ARL = 1. BLAS on one thread: on two shared cores its
    threads wait on each other and a 400-state solve takes ten times as long."""
    with threadpool_limits(1, user_api="blas"):
        return np.linalg.solve(np.eye(P.shape[0]) - P, np.ones(P.shape[0]))


# --------------------------------------------------------------------------------------
# tabular CUSUM
# --------------------------------------------------------------------------------------


def cusum_one_sided(k: float, h: float, mu: float, m: int = 400, clip: float = 0.0) -> float:
    """Upper one-sided tabular CUSUM S = max(0, S + Z - k), signal S > h; zero-state ARL.

    States 0..m-1 of width w = 2h / (2m - 1): state 0 is [0, w/2) (it holds the atom
    at S = 0), state i is [(i - 1/2) w, (i + 1/2) w), midpoint i w; the last one ends
    at h. (The lower side of a two-sided scheme is this with mu -> -mu.)
    """
    w = 2.0 * h / (2 * m - 1)
    mid = w * np.arange(m)
    upper = w * (np.arange(m) + 0.5)  # upper edges of the states
    # P(S' < edge_j | S = mid_i) = P(Z < edge_j - mid_i + k); S' = max(0, .) only moves
    # mass below 0 into state 0, which the first edge already counts
    below = cdf_below(upper[None, :] - mid[:, None] + k, mu, clip)
    P = np.diff(np.concatenate([np.zeros((m, 1)), below], axis=1), axis=1)
    arl = solve_arl(P)
    return float(arl[0])


def cusum_two_sided(k: float, h: float, mu: float, m: int = 400, clip: float = 0.0) -> float:
    """Two-sided tabular CUSUM (upper and lower sides, each with k and h), the common
    combination 1/ARL = 1/ARL+ + 1/ARL- (exact when the two sides cannot both be
    positive; otherwise checked against ``cusum_two_sided_2d``)."""
    up = cusum_one_sided(k, h, mu, m, clip)
    down = cusum_one_sided(k, h, -mu, m, clip)
    return 1.0 / (1.0 / up + 1.0 / down)


def cusum_two_sided_2d(k: float, h: float, mu: float, m: int = 60, clip: float = 0.0) -> float:
    """Two-sided tabular CUSUM by a chain on the pair (S+, S-), m x m states.

    From (a, b) = (i w, j w) a sample Z moves to (max(0, a + Z - k), max(0, b - Z - k)):
    as Z grows, S+ crosses its state edges upwards and S- its edges downwards, so the
    Z axis splits at 2m breakpoints into segments that each land in one pair of states
    (or outside, a signal). Sparse: about 2m entries per row.
    """
    w = 2.0 * h / (2 * m - 1)
    idx = np.arange(m)
    a = np.repeat(idx * w, m)  # S+ midpoint of state (i, j), row-major
    b = np.tile(idx * w, m)
    edges = w * (idx + 0.5)  # upper state edges; edges[-1] = h
    # the Z at which S+ crosses its edge p (a + Z - k = edges[p]) and at which S-
    # crosses its edge q (b - Z - k = edges[q]); below the lowest and above the highest
    # breakpoint one side is past h
    zp = edges[None, :] - a[:, None] + k
    zm = b[:, None] - k - edges[None, :]
    cuts = np.sort(np.concatenate([zp, zm], axis=1), axis=1)
    lo, hi = cuts[:, :-1], cuts[:, 1:]
    zc = 0.5 * (lo + hi)  # a point inside each segment gives its target state
    sp = np.maximum(0.0, a[:, None] + zc - k)
    sm = np.maximum(0.0, b[:, None] - zc - k)
    p_idx = np.floor(sp / w + 0.5).astype(int)
    q_idx = np.floor(sm / w + 0.5).astype(int)
    inside = (p_idx < m) & (q_idx < m) & (hi > lo)
    prob = cdf_below(hi, mu, clip) - cdf_below(lo, mu, clip)
    rows = np.broadcast_to(np.arange(m * m)[:, None], lo.shape)[inside]
    cols = (p_idx * m + q_idx)[inside]
    P = sparse.csr_matrix((prob[inside], (rows, cols)), shape=(m * m, m * m))
    arl = spsolve((sparse.identity(m * m, format="csr") - P).tocsc(), np.ones(m * m))
    return float(arl[0])


# --------------------------------------------------------------------------------------
# EWMA with the |e| statistic
# --------------------------------------------------------------------------------------


def ewma(lam: float, L: float, mu: float, m: int = 801, clip: float = 0.0) -> float:
    """EWMA e = lam Z + (1 - lam) e, signal |e| > L sigma_e, sigma_e = sqrt(lam / (2 - lam))
    (the asymptotic s.d.); zero state e = 0.

    The region (-UCL, UCL) is cut into m intervals (m odd: e = 0 is the midpoint of
    the centre one); from midpoint c_i, e' lands in [lo_j, hi_j) when
    Z in [(lo_j - (1 - lam) c_i) / lam, (hi_j - (1 - lam) c_i) / lam).
    """
    if m % 2 == 0:
        raise ValueError("m must be odd")
    ucl = L * math.sqrt(lam / (2.0 - lam))
    w = 2.0 * ucl / m
    lo_edge = -ucl + w * np.arange(m)
    c = lo_edge + w / 2.0
    base = (1.0 - lam) * c[:, None]
    hi_z = (lo_edge[None, :] + w - base) / lam
    lo_z = (lo_edge[None, :] - base) / lam
    P = cdf_below(hi_z, mu, clip) - cdf_below(lo_z, mu, clip)
    arl = solve_arl(P)
    return float(arl[m // 2])


def richardson(f_m: float, f_2m: float, order: int = 2) -> float:
    """Extrapolate a chain's value to infinitely many states from m and 2m states,
    assuming the discretisation error falls as m^-order."""
    return f_2m + (f_2m - f_m) / (2**order - 1)


# --------------------------------------------------------------------------------------
# Page-Hinkley, quasi-static
# --------------------------------------------------------------------------------------


def page_hinkley_quasi_static(
    delta: float, h: float, window: int, m: int = 300, clip: float = 0.0, nodes: int = 24
) -> float:
    """Page-Hinkley with an exponentially weighted running mean (weight a = 1/window):
    the mean's error e ~ N(0, a / (2 - a)) is held fixed over a run, during which the
    detector is a two-sided CUSUM of Z - e with reference delta; the in-control hazard
    is averaged over e (Gauss-Hermite quadrature):

        1/ARL = E_e[1/ARL+(k = delta + e) + 1/ARL-(k = delta - e)]

    (the upper side sees Z - e - delta, the lower side -(Z - e) - delta; Z clipped
    before the mean is subtracted, as the detector does). Ignores that the mean follows
    each excursion, so it understates the ARL.
    """
    a = 1.0 / window
    s = math.sqrt(a / (2.0 - a))
    x, wts = np.polynomial.hermite_e.hermegauss(nodes)  # weight exp(-x^2 / 2)
    wts = wts / math.sqrt(2.0 * math.pi)
    hazard = 0.0
    for xi, wi in zip(x, wts, strict=True):
        e = s * xi
        hazard += wi * (
            1.0 / cusum_one_sided(delta + e, h, 0.0, m, clip)
            + 1.0 / cusum_one_sided(delta - e, h, 0.0, m, clip)
        )
    return 1.0 / hazard
