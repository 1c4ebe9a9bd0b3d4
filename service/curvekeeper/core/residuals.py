"""Running residual statistics and the standardisation of residuals for the drift watch.

**Forgetting the start-up transient.** A running mean square with weight
alpha = max(1/n, 1/W) is the plain mean until n = W: every sample since the
start counts alike, so the large residuals of a learner still converging from
zero weights stay in it for W samples and more. Here alpha = min(1, max(c/n, 1/W))
with c = ``RISE`` (4): before W / c samples the weight of sample i at time n
grows like i^(c-1), so the first tenth of the history holds 1/10^c of the
weight (the effective sample size stays 7n/16). After that the memory is the
usual exponential one of W samples.

**Reference residuals.** After a calibration the drift watch takes the residual
e = z - phi . w_ref against the reference curve (the last calibration's, which the
learner cannot move). Its scale pools the fit's residual variance (nu_fit degrees
of freedom) with the variance v of e around its running mean (a plain mean of n samples,
exponential with memory W past W): s^2 = (nu_fit s_fit^2 + n v) / (nu_fit + n - 1),
nu = nu_fit + n - 1. The
watch divides e by an upper confidence bound of the s.d., s sqrt(nu / chi2_0.1(nu)):
a scale estimated on few degrees of freedom (a 5-point calibration has 3) is as often
too small as too large, and a too small one persists from sample to sample, which
a detector that sums its inputs turns into false alarms; the bound costs 4 % of the
signal at 500 degrees of freedom.
"""

from __future__ import annotations

import math
from typing import Any

from .jit import kernel

RISE = 4.0


@kernel
def weight(n: float, window: float) -> float:
    """The weight of the newest of n samples in a running mean with memory ``window``."""
    a = RISE / n
    if a < 1.0 / window:
        a = 1.0 / window
    return a if a < 1.0 else 1.0


@kernel
def pooled_sd(fit_var: float, fit_dof: float, var: float, n: float, window: float) -> Any:
    """(s, dof): the fit's variance pooled with a running variance of n samples (counted
    up to ``window``); (0, 0) when there is neither."""
    m = n if n < window else window
    dof = fit_dof + m
    if dof <= 0.0:
        return 0.0, 0.0
    v = (fit_dof * fit_var + m * var) / dof
    return math.sqrt(v) if v > 0.0 else 0.0, dof


@kernel
def reference_sd(fit_var: float, fit_dof: float, var: float, n: float, window: float) -> Any:
    """(s, dof) of the reference residuals: the fit's variance pooled with their variance
    about their own running mean (a mean over n samples, exponential past ``window``), which
    costs that estimate one degree of freedom; (0, 0) when there is neither."""
    m = n if n < window else window
    dof = fit_dof + (m - 1.0 if m > 1.0 else 0.0)
    if dof <= 0.0:
        return 0.0, 0.0
    v = (fit_dof * fit_var + m * var) / dof
    return math.sqrt(v) if v > 0.0 else 0.0, dof


@kernel
def scale_margin(dof: float, zq: float) -> float:
    """sqrt(dof / chi2_q(dof)): a scale estimate with ``dof`` degrees of freedom times this
    is an upper confidence bound on the true s.d. (chi-square quantile at the normal
    quantile zq < 0 by the Wilson-Hilferty approximation)."""
    if dof <= 0.0:
        return 1.0
    c = 2.0 / (9.0 * dof)
    q = 1.0 - c + zq * math.sqrt(c)
    if q <= 0.05:
        q = 0.05
    return math.sqrt(1.0 / (q * q * q))
