"""When a channel is expected to leave tolerance: a straight line through its curve's
largest difference from the reference curve over measurement time.

Method (``METHOD``): weighted least squares of the difference d (output units) on the
measurement time t (days), weights 1 / u^2 (equal weights when any u is unknown); the
parameter covariance is scaled by the weighted residual variance (the u set only the
relative weights). Successive points are autocorrelated (the learner moves the curve a
little per sample), which makes ordinary standard errors too small: the covariance is
widened by the lag-1 autocorrelation r1 of the weighted residuals through the effective
sample size n_eff = n (1 - r1) / (1 + r1) with n_eff - 2 degrees of freedom (the AR(1)
adjustment of trend standard errors; common practice); r1 is first raised by its bias
(1 + 3 r1) / n (Marriott and Pope's approximation, E[r1] = rho - (1 + 3 rho) / n), which
short series otherwise leave too small. The interval's coverage is then approximate:
close to nominal from about 40 points, below it for short, strongly correlated series. The crossing date is where the
line meets the tolerance. The channel's own tolerance check trips on the difference it sees
(the line plus the points' scatter), so the interval is where the line's prediction band
meets the tolerance: the line's standard error and the scatter of one more point (the
weighted residual variance at the newest point's u), Student's t for ``coverage`` (the
inverse of the band, as Fieller's interval inverts a confidence band for (T - a) / b).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .uncertainty import coverage_factor

Array = NDArray[np.float64]

METHOD = ("weighted least-squares line of the largest curve difference against measurement time; "
          "standard errors widened for lag-1 autocorrelation (AR(1) effective sample size); "
          "interval where the line's {coverage:g} % prediction band meets the tolerance")
HORIZON_DAYS = 365  # a crossing beyond this (and not plausible within it) is "not within N days"
MIN_POINTS = 5  # fewer trace points give no forecast
DAY_S = 86400.0


@dataclass(frozen=True)
class Trend:
    """d = a + b tau, tau in days from ``origin`` (POSIX seconds); ``cov`` (2, 2) of (a, b)
    after the autocorrelation widening; ``dof`` its degrees of freedom (n_eff - 2, at
    least 1); ``r1`` the lag-1 autocorrelation used (bias-raised, clipped to [0, 0.99]);
    ``scatter`` the variance of one more point about the line (output units squared)."""

    a: float
    b: float
    cov: Array
    dof: float
    n: int
    r1: float
    origin: float
    scatter: float

    def band(self, tau: ArrayLike) -> Array:
        """The standard error of one more point at tau (days from the origin): the line's
        and the scatter's, output units."""
        t = np.asarray(tau, dtype=float)
        v = self.cov[0, 0] + self.scatter + 2.0 * t * self.cov[0, 1] + t * t * self.cov[1, 1]
        return np.asarray(np.sqrt(np.maximum(v, 0.0)))


def fit_trend(t: ArrayLike, d: ArrayLike, u: ArrayLike | None = None) -> Trend:
    """The weighted line through (t, d). t (n,) POSIX seconds, d (n,) output units, u (n,)
    their standard uncertainties (None, or any not finite and positive: equal weights).
    Needs n >= 3 and two distinct times; the origin is the last time."""
    ts = np.asarray(t, dtype=float)
    ds = np.asarray(d, dtype=float)
    n = ts.size
    if n < 3 or ds.shape != ts.shape or np.ptp(ts) <= 0.0:
        raise ValueError("a trend needs at least 3 points at two or more distinct times")
    origin = float(ts.max())
    tau = (ts - origin) / DAY_S
    us = None if u is None else np.asarray(u, dtype=float)
    w = np.ones(n) if us is None or not np.all(np.isfinite(us) & (us > 0)) else 1.0 / us**2
    X = np.column_stack([np.ones(n), tau])
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(X * sw[:, None], ds * sw, rcond=None)
    e = (ds - X @ coef) * sw  # weighted residuals
    s2 = float(e @ e) / (n - 2)
    cov = np.asarray(s2 * np.linalg.inv((X * w[:, None]).T @ X), dtype=np.float64)
    r1 = float(e[:-1] @ e[1:] / (e @ e)) if e @ e > 0 else 0.0
    r1 = min(max(r1 + (1.0 + 3.0 * r1) / n, 0.0), 0.99)
    n_eff = n * (1.0 - r1) / (1.0 + r1)
    dof = max(n_eff - 2.0, 1.0)
    cov *= (n - 2) / dof  # the residual variance over n_eff - 2 instead of n - 2
    return Trend(float(coef[0]), float(coef[1]), cov, dof, n, r1, origin, s2 / float(w[np.argmax(ts)]))


def _roots(trend: Trend, tolerance: float, q: float) -> list[float]:
    """Real tau where the band's edge a + b tau +- q se(tau) equals the tolerance, sorted:
    the roots of A tau^2 - 2 B tau + C, the band covering the tolerance where it is <= 0."""
    a, b, c = trend.a, trend.b, trend.cov
    A = b * b - q * q * c[1, 1]
    B = b * (tolerance - a) + q * q * c[0, 1]
    C = (tolerance - a) ** 2 - q * q * (c[0, 0] + trend.scatter)
    if abs(A) <= 1e-12 * max(b * b, q * q * c[1, 1], 1e-300):
        return [] if B == 0 else [C / (2.0 * B)]
    disc = B * B - A * C
    if disc < 0:
        return []
    r = float(np.sqrt(disc))
    return sorted([(B - r) / A, (B + r) / A])


def _covered(trend: Trend, tolerance: float, q: float, tau: float) -> bool:
    return bool(abs(tolerance - trend.a - trend.b * tau) <= q * float(trend.band(tau)))


def crossing(trend: Trend, tolerance: float, coverage: float = 0.95) -> tuple[float | None, float | None,
                                                                            float | None]:
    """(point, low, high) in days from the trend's origin where the line meets ``tolerance``
    and the ends of the interval where its prediction band does; None where there is none
    (no rising line: no point; an end the data do not bound). Without a rising line, low is
    the first day from the origin on which the band reaches the tolerance."""
    q = float(coverage_factor(trend.dof, coverage))
    roots = _roots(trend, tolerance, q)
    if trend.b > 0:
        point = (tolerance - trend.a) / trend.b
        low = max((r for r in roots if r <= point), default=None)
        high = min((r for r in roots if r >= point), default=None)
        return point, low, high
    if _covered(trend, tolerance, q, 0.0):
        return None, 0.0, None
    return None, min((r for r in roots if r > 0), default=None), None


def _date(origin: float, tau: float | None) -> datetime | None:
    if tau is None:
        return None
    return datetime.fromtimestamp(origin, UTC) + timedelta(days=tau)


def forecast(t: ArrayLike, d: ArrayLike, u: ArrayLike | None, tolerance: float | None, *,
             horizon_days: int = HORIZON_DAYS, coverage: float = 0.95) -> dict[str, Any] | None:
    """The channel's forecast from its trace since the last calibration: t (n,) measurement
    times in POSIX seconds, d (n,) largest curve differences from the reference curve and u
    (n,) their standard uncertainties, output units; ``tolerance`` in output units.

    Returns None without a tolerance, with fewer than ``MIN_POINTS`` points or a single
    time; else ``{"leaves_tolerance_on", "low", "high"}`` (aware UTC datetimes or None),
    ``rate`` (output units per day), ``method``, ``n_points`` and ``not_within_days``:
    ``horizon_days`` with the dates None when neither the line nor its band reaches the
    tolerance within that many days of the last point, else None."""
    ts = np.asarray(t, dtype=float)
    if tolerance is None or ts.size < MIN_POINTS or np.ptp(ts) <= 0.0:
        return None
    tr = fit_trend(ts, d, u)
    point, low, high = crossing(tr, tolerance, coverage)
    out: dict[str, Any] = {"rate": tr.b, "method": METHOD.format(coverage=100 * coverage), "n_points": tr.n}
    if (point is None or point > horizon_days) and (low is None or low > horizon_days):
        return {**out, "leaves_tolerance_on": None, "low": None, "high": None, "not_within_days": horizon_days}
    return {**out, "leaves_tolerance_on": _date(tr.origin, point), "low": _date(tr.origin, low),
            "high": _date(tr.origin, high), "not_within_days": None}
