"""Drift detectors on standardised prior residuals z = r / s (s: residual s.d.).

Each detector keeps a statistic and compares it with a ``warning`` and an
``alarm`` threshold. States: 0 ``ok``, 1 ``warning``, 2 ``alarm``. An alarm is
latched until a technician acts (calibrate, rollback, or a drift settings
change); a warning follows the statistic. Inputs are clipped to +-``clip``
s.d. first (0 turns it off) so that one wild reading cannot raise an alarm on
its own (common practice; at 4 s.d. the clip changes in-control behaviour by
less than one part in 10,000 per sample).

``cusum`` (tabular, two-sided, reference ``k``)::

    S+ = max(0, S+ + z - k),  S- = max(0, S- - z - k),  statistic max(S+, S-)

Average run lengths (ARL), computed by the Markov-chain method of Brook and Evans with
the clip (tests/core/arl.py; Siegmund's approximation agrees within 1 %). CUSUM with
k = 0.5, h = 5: 465 in control and 10.4 after a 1 s.d. shift (Montgomery's table). The
defaults h = 6 (warning) and h = 11 (alarm): about 1,280 and 192,000 in control, and 22.4
samples to an alarm after a sustained 1 s.d. shift.

``page_hinkley`` (two-sided, allowance ``delta``, running mean over ``mean_window``
samples): the cumulative deviations from the running mean, minus ``delta``, against their
running minimum, in the recursive form ``g+ = max(0, g+ + z - m - delta)`` (and the mirror
for decreases). The running mean (the baseline) makes it a test for a change rather than
for a level: insensitive to a constant bias of the residuals, such as a reference fit's own
error. The baseline learns from every sample for its first ``SETTLE`` (prior count
included), then only while both statistics are under ``FREEZE``, so that a change under
test is not absorbed into it; a residual beyond the clip never moves it (a gross offset is
no bias to be learnt); it may start at 0 with a prior count (the channel sets one
after a calibration). ARL in control,
quasi-statically (the mean moves slowly next to a run of the test): 1,000 to a warning and
162,000 to an alarm at the defaults (delta 0.5, warning 6, alarm 12, window 100), a lower
bound (the running mean absorbs part of each excursion toward the threshold); about 24.4
samples to an alarm after a 1 s.d. shift once the baseline has settled (CUSUM's figure
with k = delta). The window of 100 lets the baseline follow a slow ageing of up to about
delta / 100 s.d. per sample without an alarm (that is the tolerance check's to report);
windows of 300 and 1000 alarmed on the ordinary ageing of the demo's cold-store probes,
and the alarm level of 12 (not 11) keeps the in-control ARL above 10^5 with it.

``ewma`` (weight ``lambda``): e = lambda z + (1 - lambda) e, statistic
|e| / sqrt(lambda / (2 - lambda)) (in s.d. of e at steady state). With lambda = 0.1 and
L = 2.814 about 500 in control (the textbook design); the defaults lambda = 0.05, warning
3.0, alarm 4.4 give 1,380 and 207,000 in control and 23.8 samples after a 1 s.d. shift.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from .jit import kernel

DETECTORS = {"page_hinkley": 0, "cusum": 1, "ewma": 2}
STATES = ("ok", "warning", "alarm")

DETECTOR_DEFAULTS: dict[str, dict[str, Any]] = {
    "page_hinkley": {"delta": 0.5, "warning": 6.0, "alarm": 12.0, "mean_window": 100, "clip": 4.0},
    "cusum": {"k": 0.5, "warning": 6.0, "alarm": 11.0, "clip": 4.0},
    "ewma": {"lambda": 0.05, "warning": 3.0, "alarm": 4.4, "clip": 4.0},
}

# layout of the parameter vector dp: reference (k, delta or lambda), thresholds, clip, mean alpha
DP_REF, DP_WARNING, DP_ALARM, DP_CLIP, DP_ALPHA = range(5)
DP_SIZE = 5
# layout of the state vector ds: a (S+ / g+ / e), b (S- / g-), running mean, n seen (plus the
# prior count of the mean), state code
DS_A, DS_B, DS_MEAN, DS_N, DS_STATE = range(5)
DS_SIZE = 5
OK, WARNING, ALARM = range(3)  # state codes, the index into STATES
# Page-Hinkley's running mean (the baseline) learns from every sample for its first SETTLE
# (prior count included), then only while both statistics are under FREEZE, so a change
# under test is not absorbed into the baseline it is tested against
SETTLE = 50.0
FREEZE = 3.0


def detector_params(cfg: dict[str, Any]) -> tuple[int, NDArray[np.float64]]:
    """(kind code, dp) for a normalised ``drift`` config."""
    kind = cfg["detector"]
    dp = np.zeros(DP_SIZE)
    if kind == "cusum":
        dp[DP_REF] = cfg["k"]
    elif kind == "page_hinkley":
        dp[DP_REF] = cfg["delta"]
        dp[DP_ALPHA] = 1.0 / cfg["mean_window"]
    else:
        dp[DP_REF] = cfg["lambda"]
    dp[DP_WARNING] = cfg["warning"]
    dp[DP_ALARM] = cfg["alarm"]
    dp[DP_CLIP] = cfg["clip"]
    return DETECTORS[kind], dp


def new_detector_state() -> NDArray[np.float64]:
    return np.zeros(DS_SIZE)


@kernel
def detector_update(kind: int, dp: Any, ds: Any, z: float) -> float:
    """One standardised residual z into the detector; returns the statistic."""
    clip = dp[DP_CLIP]
    clipped = False
    if clip > 0.0:
        if z > clip:
            z, clipped = clip, True
        elif z < -clip:
            z, clipped = -clip, True
    ds[DS_N] += 1.0
    if kind == 1:
        k = dp[DP_REF]
        a = ds[DS_A] + z - k
        b = ds[DS_B] - z - k
        ds[DS_A] = a if a > 0.0 else 0.0
        ds[DS_B] = b if b > 0.0 else 0.0
        stat = float(ds[DS_A] if ds[DS_A] > ds[DS_B] else ds[DS_B])
    elif kind == 0:
        delta = dp[DP_REF]
        dev = z - ds[DS_MEAN]
        a = ds[DS_A] + dev - delta
        b = ds[DS_B] - dev - delta
        ds[DS_A] = a if a > 0.0 else 0.0
        ds[DS_B] = b if b > 0.0 else 0.0
        alpha = 1.0 / ds[DS_N]
        if alpha < dp[DP_ALPHA]:
            alpha = dp[DP_ALPHA]
        if not clipped and (ds[DS_N] < SETTLE or (ds[DS_A] < FREEZE and ds[DS_B] < FREEZE)):
            ds[DS_MEAN] += alpha * (z - ds[DS_MEAN])
        stat = float(ds[DS_A] if ds[DS_A] > ds[DS_B] else ds[DS_B])
    else:
        lam = dp[DP_REF]
        ds[DS_A] = lam * z + (1.0 - lam) * ds[DS_A]
        stat = float(abs(ds[DS_A]) / np.sqrt(lam / (2.0 - lam)))
    if ds[DS_STATE] < ALARM:
        if stat > dp[DP_ALARM]:
            ds[DS_STATE] = ALARM
        elif stat > dp[DP_WARNING]:
            ds[DS_STATE] = WARNING
        else:
            ds[DS_STATE] = OK
    return stat


@kernel
def detector_statistic(kind: int, dp: Any, ds: Any) -> float:
    """The current statistic of a detector state, without an update."""
    if kind == 2:
        return float(abs(ds[DS_A]) / np.sqrt(dp[DP_REF] / (2.0 - dp[DP_REF])))
    return float(ds[DS_A] if ds[DS_A] > ds[DS_B] else ds[DS_B])


@kernel
def run_lengths(kind: int, dp: Any, z: Any, level: int, max_runs: int) -> Any:
    """Run lengths to the first state >= ``level`` on a stream z, restarting after each.

    Returns (lengths of completed runs, samples in the last, unfinished run). A restart
    clears the statistics and the state but keeps Page-Hinkley's running mean, which
    is at its steady state in a long in-control stream. Used to estimate average run
    lengths by simulation.
    """
    out = np.empty(max_runs, dtype=np.int64)
    count = 0
    ds = np.zeros(DS_SIZE)
    length = 0
    for i in range(z.shape[0]):
        detector_update(kind, dp, ds, z[i])
        length += 1
        if ds[DS_STATE] >= level:
            out[count] = length
            count += 1
            if count == max_runs:
                return out[:count], 0
            length = 0
            ds[DS_A] = 0.0
            ds[DS_B] = 0.0
            ds[DS_STATE] = OK
    return out[:count], length


@kernel
def first_reach(kind: int, dp: Any, ds: Any, z: Any, level: int) -> int:
    """Feed z into the detector state ds; index of the first sample whose state is
    >= ``level``, or -1."""
    for i in range(z.shape[0]):
        detector_update(kind, dp, ds, z[i])
        if ds[DS_STATE] >= level:
            return i
    return -1
