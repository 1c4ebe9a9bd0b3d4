"""The per-sample recursion: one compiled loop over a batch, in order.

For each sample i (phi = Phi[i], transformed reference z = z[i]):

1. a sample the caller holds back (``hold[i]``: out of range, not finite, out of
   service) is counted and nothing else; so is one whose residual or step would
   not be a finite number (``not_finite``): no non-finite number enters the state;
2. prior residual r = z - w . phi against the learner's curve (and in output
   units, y - g^-1(w . phi));
3. the drift watch: with a reference curve (after a calibration), the detector
   takes the reference residual e = z - w_ref . phi, standardised by the pooled
   scale of ``residuals.py``, from the first sample on, so a change the learner
   absorbs still shows; without one, it takes r / s after the warm-up. An outlier
   (below) is left out when it comes alone, a contact glitch most likely; from the
   second of a run on, it goes in (a lasting step must raise the alarm);
4. outlier gate: |r| > outlier_sd * s after ``WARMUP`` samples learnt since the start
   or the last calibration (a bench calibration's scatter is seldom that of the
   installation, so s must have seen the installation first) -> stored, not learned;
5. the step, ``sgd`` (LMS with a schedule, optional l2 pull toward the reference
   weights and Huber clipping of r at ``huber`` * s) or ``rls`` (``rls.py``:
   exact initialisation, forgetting with a bounded trace)::

       sgd: w <- w + eta * clip(r) * phi - eta * l2 * (w - w_ref)

6. divergence guard: an unstable step is not applied (SGD: eta |phi|^2 > 2 or
   eta l2 > 1; RLS: lambda + phi' P phi not positive). SGD halves its step scale
   and earns it back by the factor ``RECOVER`` per applied step;
7. residual statistics (``residuals.py``): running mean squares of r, in the fitted
   space and in output units, that forget the start-up transient.

Numbers are plain float64 operations in a fixed order, so a model restored
from its state and fed the same samples gives the same weights to the last bit.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .drift import ALARM, DS_A, DS_B, DS_SIZE, DS_STATE, detector_statistic, detector_update
from .jit import kernel
from .residuals import pooled_sd, reference_sd, scale_margin, weight
from .rls import info_solve, info_step, rls_step
from .schedules import eta_at

LEARNERS = {"sgd": 0, "rls": 1}

# int parameters
IP_LEARNER, IP_SCHEDULE, IP_TRANSFORM, IP_DETECTOR = range(4)
IP_SIZE = 4
# float parameters
LP_L2, LP_HUBER, LP_OUTLIER, LP_FORGET, LP_OFFSET, LP_WARMUP, LP_WINDOW, LP_BOUND = range(8)
LP_SIZE = 8
# running state: step count and scale; learner residuals (count, mean square; output units);
# counts; the last fit's residual variance and dof; reference residuals (count, mean,
# variance); the RLS trace bound and initialisation flag; samples held back; the outliers in a
# row; the gate's mean square of the learner residuals (plain mean, then exponential)
(ST_T, ST_SCALE, ST_RN, ST_RVAR, ST_ON, ST_OMS, ST_ACC, ST_REJ, ST_GUARD, ST_FVAR, ST_FDOF,
 ST_EN, ST_EMEAN, ST_EVAR, ST_TRMAX, ST_INIT, ST_HELD, ST_ORUN, ST_GVAR) = range(19)
ST_SIZE = 19

# sample status codes; codes from HELD on are set by the caller before the loop
ACCEPTED, OUTLIER, GUARD, NOT_FINITE, OUT_OF_RANGE, OUT_OF_SERVICE = range(6)
HELD = NOT_FINITE
STATUS_NAMES = ("accepted", "outlier", "guard", "not_finite", "out_of_range", "out_of_service")

# the weight, in degrees of freedom, of the calibration's scatter in the watch's scale: a
# bench's scatter is seldom the installation's, so the samples soon outweigh it
SCALE_PRIOR_DOF = 3.0
SCALE_Z = -1.2816  # the 10 % normal quantile: the watch divides by a 90 % upper bound of the s.d.
RECOVER = 2.0 ** (1.0 / 20.0)  # the SGD step scale doubles back per 20 applied steps


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
def learn_batch(
    Phi: Any, z: Any, y: Any, hold: Any,
    w: Any, w_ref: Any, has_ref: bool, P: Any, b: Any,
    ip: Any, sp: Any, lp: Any, dp: Any,
    st: Any, ds: Any, cp_w: Any,
    out_r: Any, out_status: Any, out_state: Any, out_stat: Any,
    snap_w: Any, snap_P: Any, snap_st: Any, snap_ds: Any,
) -> int:
    """Learn from the rows of Phi (n, M) in order, updating w, P, b, st, ds, cp_w in place.

    z : (n,) references in the transformed space; y : (n,) in output units; hold : (n,)
    status codes (0: learn it; >= HELD: store it only).
    w_ref (M,) reference weights (used when has_ref); P (M, M) RLS covariance (the
    information matrix while ST_INIT is set, with b (M,)); cp_w (2, M) the learner's weights
    when the detector's upward / downward statistic was last zero (its change point).
    out_r : (n,) prior residuals in output units (NaN where unknown); out_status : (n,)
    status codes; out_state, out_stat : drift state and statistic after each sample.

    snap_w (M,), snap_P (M, M), snap_st, snap_ds : filled, when a sample raises the drift
    alarm, with the state just before it, the weights being those at the estimated change
    point (the caller's buffers: returning new arrays would cost more than a one-sample call).

    Returns the index of the sample that raised the drift alarm, or -1.
    """
    n, M = Phi.shape
    wn = np.empty(M)
    Pphi = np.empty(M)
    L = np.zeros((M, M))
    ds_before = np.empty(DS_SIZE)
    alarm_at = -1
    learner = ip[IP_LEARNER]
    sk = ip[IP_SCHEDULE]
    tcode = ip[IP_TRANSFORM]
    dk = ip[IP_DETECTOR]
    outlier = lp[LP_OUTLIER]
    warmup = lp[LP_WARMUP]
    window = lp[LP_WINDOW]
    lam = lp[LP_FORGET]
    for i in range(n):
        out_r[i] = math.nan
        out_stat[i] = detector_statistic(dk, dp, ds)
        out_state[i] = int(ds[DS_STATE])
        if hold[i] >= HELD:
            out_status[i] = hold[i]
            st[ST_HELD] += 1.0
            continue
        phi = Phi[i]
        if learner == 1 and st[ST_INIT] > 0.0:
            # RLS still gathering the rows that determine its first solution
            if not info_step(P, b, phi, z[i], lam):
                out_status[i] = NOT_FINITE
                st[ST_HELD] += 1.0
                continue
            if info_solve(P, b, w, L):
                st[ST_INIT] = 0.0
                tr = 0.0
                for a in range(M):
                    tr += P[a, a]
                st[ST_TRMAX] = lp[LP_BOUND] * tr
            out_status[i] = ACCEPTED
            st[ST_ACC] += 1.0
            continue
        pred = 0.0
        for j in range(M):
            pred += w[j] * phi[j]
        r = z[i] - pred
        e = r
        if has_ref:
            e = z[i]
            for j in range(M):
                e -= w_ref[j] * phi[j]
        if not (math.isfinite(r * r) and math.isfinite(e * e)):
            out_status[i] = NOT_FINITE
            st[ST_HELD] += 1.0
            continue
        ro = y[i] - _inverse(pred, tcode, lp[LP_OFFSET])
        if math.isfinite(ro * ro):
            out_r[i] = ro
        s, dof = pooled_sd(st[ST_FVAR], st[ST_FDOF], st[ST_RVAR], st[ST_RN], window)
        warm = st[ST_RN] >= warmup and s > 0.0
        # the gate keeps the learner's whole history in its scale: while a learner still
        # converges, its residuals are largest where the curve is worst (often the range's
        # ends), and a scale that has forgotten the start would hold exactly those back
        sg, _ = pooled_sd(st[ST_FVAR], st[ST_FDOF], st[ST_GVAR], st[ST_RN], window)
        gated = warm and outlier > 0.0 and abs(r) > outlier * max(s, sg)
        # the drift watch; a lone outlier (a contact glitch) is left out of it, a run of them
        # (a step) goes in from its second sample on
        lone = gated and st[ST_ORUN] == 0.0
        score = math.nan
        if lone:
            pass
        elif has_ref:
            es, edof = reference_sd(st[ST_FVAR], min(st[ST_FDOF], SCALE_PRIOR_DOF), st[ST_EVAR], st[ST_EN], window)
            # a scatter of zero (an exact calibration) cannot scale a residual: floor it at
            # the rounding of float64 numbers of z's size
            floor = 1e-12 * abs(z[i]) + 1e-300
            if edof > 0.0:
                score = e / (max(es, floor) * scale_margin(edof, SCALE_Z))
        elif warm:
            score = r / s
        if score == score:
            watching = ds[DS_STATE] < ALARM
            if watching:
                ds_before[:] = ds
            out_stat[i] = detector_update(dk, dp, ds, score)
            if ds[DS_A] <= 0.0:
                cp_w[0, :] = w
            if ds[DS_B] <= 0.0:
                cp_w[1, :] = w
            if watching and ds[DS_STATE] == ALARM:
                # w, P and st are still those before this sample: the step comes below
                alarm_at = i
                side = 0 if ds[DS_A] >= ds[DS_B] else 1
                snap_w[:] = cp_w[side]
                snap_P[:, :] = P
                snap_st[:] = st
                snap_ds[:] = ds_before
            out_state[i] = int(ds[DS_STATE])
        if has_ref and not lone:  # the reference residuals' running mean and variance, after the watch
            es = math.sqrt(st[ST_EVAR])
            st[ST_EN] += 1.0
            a = 1.0 / st[ST_EN] if st[ST_EN] < window else 1.0 / window
            d = e - st[ST_EMEAN]
            if es > 0.0:  # winsorised at 4 s.d., so one wild reading cannot blunt the watch
                d = max(-4.0 * es, min(4.0 * es, d))
            st[ST_EMEAN] += a * d
            st[ST_EVAR] = (1.0 - a) * (st[ST_EVAR] + a * d * d)
        st[ST_ORUN] = st[ST_ORUN] + 1.0 if gated else 0.0  # after the watch: a snapshot there is "before"
        if gated:
            out_status[i] = OUTLIER
            st[ST_REJ] += 1.0
            continue
        if learner == 0:
            ok = _sgd_step(w, w_ref, phi, r, s, warm, sk, sp, lp, st, wn)
        else:
            ok = rls_step(w, P, phi, r, lam, st[ST_TRMAX], Pphi, wn)
        if not ok:
            out_status[i] = GUARD
            st[ST_GUARD] += 1.0
            if learner == 0:
                st[ST_SCALE] *= 0.5
            continue
        out_status[i] = ACCEPTED
        if learner == 0 and st[ST_SCALE] < 1.0:
            st[ST_SCALE] = min(1.0, st[ST_SCALE] * RECOVER)
        st[ST_T] += 1.0
        st[ST_ACC] += 1.0
        st[ST_RN] += 1.0
        st[ST_RVAR] += weight(st[ST_RN], window) * (r * r - st[ST_RVAR])
        st[ST_GVAR] += max(1.0 / st[ST_RN], 1.0 / window) * (r * r - st[ST_GVAR])
        if out_r[i] == out_r[i]:
            st[ST_ON] += 1.0
            st[ST_OMS] += weight(st[ST_ON], window) * (ro * ro - st[ST_OMS])
    return alarm_at
