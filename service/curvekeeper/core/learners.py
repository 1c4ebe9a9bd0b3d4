"""The per-sample recursion: one compiled loop over a batch, in order.

For each sample i (phi = Phi[i], transformed reference z = z[i]):

1. prior residual r = z - w . phi, and in output units y - g^-1(w . phi);
2. after the warm-up, the drift detector takes r / s (s: residual s.d.), for
   every sample, gated or not;
3. outlier gate: |r| > outlier_sd * s after the warm-up -> stored, not learned;
4. the step, ``sgd`` (LMS with a schedule, optional l2 pull toward the
   reference weights and Huber clipping of r at ``huber`` * s) or ``rls``
   (recursive least squares with forgetting factor lambda)::

       sgd: w <- w + eta * clip(r) * phi - eta * l2 * (w - w_ref)
       rls: k = P phi / (lambda + phi' P phi);  w <- w + k r;
            P <- (P - k phi' P) / lambda

5. divergence guard: a step is not applied when it is unstable (SGD:
   eta |phi|^2 > 2, which makes the sample's own residual grow, or eta l2 > 1;
   RLS: lambda + phi' P phi not positive) or leaves a non-finite weight; SGD
   halves its step scale, RLS restarts P at its initial value;
6. residual statistics: an exponentially weighted mean square of r (and of the
   output-unit residual) with weight max(1/n, ``alpha``).

Numbers are plain float64 operations in a fixed order, so a model restored
from its state and fed the same samples gives the same weights to the last bit.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .drift import ALARM, DS_SIZE, DS_STATE, detector_statistic, detector_update
from .jit import kernel
from .schedules import eta_at

LEARNERS = {"sgd": 0, "rls": 1}

# int parameters
IP_LEARNER, IP_SCHEDULE, IP_TRANSFORM, IP_DETECTOR = range(4)
IP_SIZE = 4
# float parameters
LP_L2, LP_HUBER, LP_OUTLIER, LP_FORGET, LP_P0, LP_OFFSET, LP_WARMUP, LP_ALPHA = range(8)
LP_SIZE = 8
# running state
ST_T, ST_SCALE, ST_RN, ST_RVAR, ST_ON, ST_OMS, ST_ACC, ST_REJ, ST_GUARD, ST_FVAR, ST_FDOF = range(11)
ST_SIZE = 11

ACCEPTED, OUTLIER, GUARD = 0, 1, 2


@kernel
def _inverse(z: float, code: int, offset: float) -> float:
    if code == 0:
        return z
    if code == 1:
        if z == 0.0:
            return math.inf
        return 1.0 / z - offset
    if z > 700.0:
        return math.inf
    return math.exp(z) - offset


@kernel
def _sgd_step(
    w: Any, w_ref: Any, phi: Any, r: float, s: float, warm: bool,
    sk: int, sp: Any, lp: Any, st: Any, wn: Any,
) -> bool:
    M = w.shape[0]
    nrm2 = 0.0
    for j in range(M):
        nrm2 += phi[j] * phi[j]
    eta = eta_at(sk, sp, st[ST_T], nrm2) * st[ST_SCALE]
    rc = r
    huber = lp[LP_HUBER]
    if huber > 0.0 and warm:
        c = huber * s
        if rc > c:
            rc = c
        elif rc < -c:
            rc = -c
    shrink = eta * lp[LP_L2]
    if not (eta * nrm2 <= 2.0) or not (shrink <= 1.0):
        return False
    g = eta * rc
    for j in range(M):
        v = w[j] + g * phi[j] - shrink * (w[j] - w_ref[j])
        if not math.isfinite(v):
            return False
        wn[j] = v
    for j in range(M):
        w[j] = wn[j]
    return True


@kernel
def _rls_step(w: Any, P: Any, phi: Any, r: float, lp: Any, Pphi: Any, wn: Any) -> bool:
    M = w.shape[0]
    lam = lp[LP_FORGET]
    den = lam
    for i in range(M):
        acc = 0.0
        for j in range(M):
            acc += P[i, j] * phi[j]
        Pphi[i] = acc
        den += phi[i] * acc
    if not (den > 0.0) or not math.isfinite(den):
        return False
    for i in range(M):
        v = w[i] + Pphi[i] / den * r
        if not math.isfinite(v):
            return False
        wn[i] = v
    for i in range(M):
        ki = Pphi[i] / den
        for j in range(i, M):
            v = (P[i, j] - ki * Pphi[j]) / lam
            P[i, j] = v
            P[j, i] = v
    for i in range(M):
        w[i] = wn[i]
    return True


@kernel
def learn_batch(
    Phi: Any, z: Any, y: Any,
    w: Any, w_ref: Any, P: Any,
    ip: Any, sp: Any, lp: Any, dp: Any,
    st: Any, ds: Any,
    out_r: Any, out_status: Any, out_state: Any, out_stat: Any,
    snap_w: Any, snap_P: Any, snap_st: Any, snap_ds: Any,
) -> int:
    """Learn from the rows of Phi (n, M) in order, updating w, P, st, ds in place.

    z : (n,) references in the transformed space; y : (n,) in output units.
    out_r : (n,) prior residuals in output units (NaN where the curve cannot be inverted);
    out_status : (n,) ACCEPTED / OUTLIER / GUARD; out_state, out_stat : drift state and
    statistic after each sample.

    snap_w (M,), snap_P (M, M), snap_st, snap_ds : filled with the state just before the
    sample that raised the drift alarm, if one did (the caller's buffers: returning new
    arrays from the kernel would cost more than the rest of a one-sample call).

    Returns the index of the sample that raised the drift alarm, or -1.
    """
    n, M = Phi.shape
    wn = np.empty(M)
    Pphi = np.empty(M)
    ds_before = np.empty(DS_SIZE)
    alarm_at = -1
    learner = ip[IP_LEARNER]
    sk = ip[IP_SCHEDULE]
    tcode = ip[IP_TRANSFORM]
    dk = ip[IP_DETECTOR]
    outlier = lp[LP_OUTLIER]
    warmup = lp[LP_WARMUP]
    alpha_min = lp[LP_ALPHA]
    for i in range(n):
        phi = Phi[i]
        pred = 0.0
        for j in range(M):
            pred += w[j] * phi[j]
        r = z[i] - pred
        ro = y[i] - _inverse(pred, tcode, lp[LP_OFFSET])
        out_r[i] = ro if math.isfinite(ro) else math.nan
        s = math.sqrt(st[ST_RVAR])
        warm = st[ST_RN] >= warmup and s > 0.0
        if warm:
            watching = ds[DS_STATE] < ALARM
            if watching:
                ds_before[:] = ds
            out_stat[i] = detector_update(dk, dp, ds, r / s)
            if watching and ds[DS_STATE] == ALARM:
                # w, P and st are still those before this sample: the step comes below
                alarm_at = i
                snap_w[:] = w
                snap_P[:, :] = P
                snap_st[:] = st
                snap_ds[:] = ds_before
        else:
            out_stat[i] = detector_statistic(dk, dp, ds)
        out_state[i] = int(ds[DS_STATE])
        if warm and outlier > 0.0 and abs(r) > outlier * s:
            out_status[i] = OUTLIER
            st[ST_REJ] += 1.0
            continue
        if learner == 0:
            ok = _sgd_step(w, w_ref, phi, r, s, warm, sk, sp, lp, st, wn)
        else:
            ok = _rls_step(w, P, phi, r, lp, Pphi, wn)
        if not ok:
            out_status[i] = GUARD
            st[ST_GUARD] += 1.0
            if learner == 0:
                st[ST_SCALE] *= 0.5
            else:
                for a in range(M):
                    for b in range(M):
                        P[a, b] = lp[LP_P0] if a == b else 0.0
            continue
        out_status[i] = ACCEPTED
        st[ST_T] += 1.0
        st[ST_ACC] += 1.0
        st[ST_RN] += 1.0
        alpha = 1.0 / st[ST_RN]
        if alpha < alpha_min:
            alpha = alpha_min
        st[ST_RVAR] += alpha * (r * r - st[ST_RVAR])
        if math.isfinite(ro):
            st[ST_ON] += 1.0
            alpha = 1.0 / st[ST_ON]
            if alpha < alpha_min:
                alpha = alpha_min
            st[ST_OMS] += alpha * (ro * ro - st[ST_OMS])
    return alarm_at
