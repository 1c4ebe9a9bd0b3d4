"""``ChannelModel``: one channel's calibration curve, its learner, drift watch and guards.

>>> from curvekeeper.channel_config import channel_config  # the service's validation
>>> m = ChannelModel.from_config(channel_config({"inputs": [{"name": "raw", "min": 0, "max": 1000}]}))
>>> report = m.fit_closed_form([0.0, 500.0, 1000.0], [1.0, 6.0, 11.0])
>>> [round(c, 9) for c in report["poly_coefficients"]]
[1.0, 0.01]
>>> y, u = m.predict([250.0])
>>> round(float(y[0]), 9)
3.5
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .basis import Basis, PolyBasis, make_basis
from .config import MUTABLE, Config
from .drift import DS_BOUND, DS_N, DS_STATE, STATES, detector_params, detector_statistic
from .errors import ConfigError, InputError, StateError
from .learners import (
    GUARD,
    IP_DETECTOR,
    IP_LEARNER,
    IP_SCHEDULE,
    IP_SIZE,
    IP_TRANSFORM,
    LEARNERS,
    LP_BOUND,
    LP_FORGET,
    LP_HUBER,
    LP_L2,
    LP_OFFSET,
    LP_OUTLIER,
    LP_SIZE,
    LP_WARMUP,
    LP_WINDOW,
    NOT_FINITE,
    OUT_OF_RANGE,
    OUT_OF_SERVICE,
    ST_ACC,
    ST_EMEAN,
    ST_EN,
    ST_EVAR,
    ST_FDOF,
    ST_FVAR,
    ST_GUARD,
    ST_HELD,
    ST_INIT,
    ST_OMS,
    ST_ON,
    ST_REJ,
    ST_RN,
    ST_RVAR,
    ST_SCALE,
    ST_T,
    ST_TRMAX,
    STATUS_NAMES,
    learn_batch,
)
from .lstsq import fit_least_squares
from .scaling import InputScaler
from .schedules import schedule_params
from .state import ModelState
from .transform import OutputTransform
from .prediction import Prediction
from .prediction import predict as predict_values

Array = NDArray[np.float64]

WARMUP = 30  # degrees of freedom behind the residual s.d. before the outlier gate starts
RESIDUAL_WINDOW = 500  # samples: memory of the residual s.d. estimates
COVARIANCE_BOUND = 10.0  # the RLS trace bound of a channel declared before it was a setting
BASELINE_PRIOR = 30.0  # samples: the prior weight of the drift baseline's start at 0
RANGE_MARGIN = 1.0  # the out-of-range margin of a channel declared before it was a setting
CURVE_GRID = 201  # points over the input range for curve comparisons

__all__ = ["MUTABLE", "ChannelModel", "LearnResult"]


@dataclass
class LearnResult:
    """Per-sample outcome of ``learn``, each (n,): prior residuals in output units
    (NaN where the curve cannot be inverted), status (``accepted`` / ``outlier`` /
    ``guard``), drift state and statistic after the sample; plus events; and, when a
    sample raised the drift alarm, its index and the model's state (``to_state`` form)
    just before it."""

    residuals: Array
    status: list[str]
    drift_state: list[str]
    drift_statistic: Array
    events: list[dict[str, Any]] = field(default_factory=list)
    alarm_index: int | None = None
    before_alarm: dict[str, Any] | None = None

    @property
    def accepted(self) -> int:
        return sum(1 for s in self.status if s == "accepted")



class ChannelModel:
    """A channel's model; build it with ``from_config`` or ``from_state``. ``config`` is
    the channel's validated configuration (``curvekeeper.core.config``), fixed for the
    model's life; the learned state is ``to_state()``."""

    def __init__(self, config: Config, state: ModelState) -> None:
        self.config = config
        self.scaler = InputScaler(config["inputs"])
        self.basis: Basis = make_basis(config["basis"], self.scaler)
        out = config["output"]
        self.transform = OutputTransform(out["transform"], out["offset"])
        self.s = state
        self._grid_x: Array | None = None  # the standard grid, (g, d) raw inputs
        self._grid_phi: Array | None = None
        self._compile_params()

    # construction -------------------------------------------------------------
    @classmethod
    def from_config(cls, config: Config) -> ChannelModel:
        """A fresh model (zero weights) for a validated channel configuration."""
        size = make_basis(config["basis"], InputScaler(config["inputs"])).size
        model = cls(config, ModelState.fresh(size))
        if config["learner"]["kind"] == "rls":
            model._start_rls()
        return model

    def _start_rls(self) -> None:
        """The RLS covariance from scratch: exact initialisation, or the declared prior P0 I."""
        s, size = self.s, self.basis.size
        p0 = self.config["learner"].get("initial_covariance")
        if p0 is None:
            s.cov, s.info_b, s.st[ST_INIT] = np.zeros((size, size)), np.zeros(size), 1.0
        else:
            s.cov, s.info_b, s.st[ST_INIT] = np.eye(size) * p0, None, 0.0
            self._bound_trace()

    def _bound_trace(self) -> None:
        """T_max of the RLS covariance: ``covariance_bound`` x trace(P) now."""
        if self.s.cov is not None and self.s.info_b is None:
            self.s.st[ST_TRMAX] = self.lp[LP_BOUND] * float(np.trace(self.s.cov))

    @classmethod
    def from_state(cls, config: Config, state: dict[str, Any]) -> ChannelModel:
        """Restore a model from its configuration and ``to_state()``; raises ``StateError``
        on a damaged state or one that does not fit the configuration."""
        model = cls(config, ModelState.from_dict(state))
        if model.s.w.shape[0] != model.basis.size:
            raise StateError(f"the state has {model.s.w.shape[0]} weights, the basis {model.basis.size}")
        if config["learner"]["kind"] == "rls" and model.s.cov is None:
            raise StateError("an rls state needs its covariance")
        if config["learner"]["kind"] == "rls" and model.s.st[ST_TRMAX] == 0.0:
            model._bound_trace()  # a state from before the bound
        return model

    def copy(self) -> ChannelModel:
        """An independent copy of the learned state sharing the (immutable) settings."""
        other = object.__new__(ChannelModel)
        other.__dict__.update(self.__dict__)
        other.s = self.s.copy()
        return other

    def to_state(self) -> dict[str, Any]:
        """The learned state as JSON-safe plain types (without the configuration)."""
        return self.s.to_dict()

    def with_settings(self, config: Config) -> ChannelModel:
        """A copy under a new validated configuration that differs only in ``MUTABLE``
        settings (learner, drift, guards), with the same learned state; the drift watch
        restarts when the drift settings change.

        Raises ``ConfigError`` with field ``immutable`` when another setting differs.
        """
        fixed = sorted(k for k in set(config) | set(self.config)
                       if k not in MUTABLE and config.get(k) != self.config.get(k))
        if fixed:
            raise ConfigError(
                f"{', '.join(fixed)} cannot change after creation; create a new channel",
                field="immutable",
            )
        state = self.s.copy()
        if _watch(config["drift"]) != _watch(self.config["drift"]):
            state.reset_detector(keep_alarm=True)  # settings never clear an alarm
        model = ChannelModel(config, state)
        if config["learner"]["kind"] == "rls":
            if self.config["learner"]["kind"] != "rls" and (state.cov is None or state.w_ref is None):
                model._start_rls()  # no covariance of a fit to go on
            elif config["learner"] != self.config["learner"]:
                model._bound_trace()
        if config["drift"]["tolerance"] != self.config["drift"]["tolerance"]:
            model._check_tolerance()
        return model

    def _compile_params(self) -> None:
        cfg = self.config
        learner = cfg["learner"]
        self.ip = np.zeros(IP_SIZE, dtype=np.int64)
        self.lp = np.zeros(LP_SIZE)
        self.ip[IP_LEARNER] = LEARNERS[learner["kind"]]
        if learner["kind"] == "sgd":
            self.ip[IP_SCHEDULE], self.sp = schedule_params(learner["schedule"])
            self.lp[LP_L2] = learner["l2"]
            self.lp[LP_HUBER] = learner["huber"] or 0.0
        else:
            self.ip[IP_SCHEDULE], self.sp = schedule_params({"kind": "constant"})
            self.lp[LP_FORGET] = learner["forgetting"]
            self.lp[LP_BOUND] = learner.get("covariance_bound", COVARIANCE_BOUND)
        self.ip[IP_TRANSFORM] = self.transform.code
        self.ip[IP_DETECTOR], self.dp = detector_params(cfg["drift"])
        self.lp[LP_OUTLIER] = cfg["outlier_sd"] or 0.0
        self.lp[LP_OFFSET] = self.transform.offset
        self.lp[LP_WARMUP] = WARMUP
        self.lp[LP_WINDOW] = RESIDUAL_WINDOW

    # inputs -------------------------------------------------------------------
    def _samples(self, X: Any, y: Any) -> tuple[Array, Array]:
        Xa = self.scaler.check(X)
        try:
            ya = np.asarray(y, dtype=np.float64).reshape(-1)
        except (TypeError, ValueError) as exc:
            raise InputError("reference values must be numbers", field="y") from exc
        if ya.shape[0] != Xa.shape[0]:
            raise InputError(f"{Xa.shape[0]} inputs but {ya.shape[0]} reference values", field="y")
        if not np.isfinite(ya).all():
            i = int(np.argmax(~np.isfinite(ya)))
            raise InputError(f"reference value at position {i} is not a finite number", field="y",
                             details={"index": i})
        return Xa, ya

    def _rows(self, X: Array, y: Array) -> tuple[Array, Array, NDArray[np.int8]]:
        """Basis rows Phi (n, M), transformed references z (n,) and the status code of each
        sample held back before learning (0: learn it): out of service, out of range (beyond
        ``range_margin`` spans outside the declared range), not finite (a basis row or z that
        overflows). Held rows of Phi and z are zero."""
        n = X.shape[0]
        hold = np.zeros(n, dtype=np.int8)
        if self.s.service != "in_service":
            hold[:] = OUT_OF_SERVICE
            return np.zeros((n, self.basis.size)), np.zeros(n), hold
        margin = self.config.get("range_margin", RANGE_MARGIN)
        span = self.scaler.hi - self.scaler.lo
        far = ((X < self.scaler.lo - margin * span) | (X > self.scaler.hi + margin * span)).any(axis=1)
        hold[far] = OUT_OF_RANGE
        keep = ~far
        Phi = np.zeros((n, self.basis.size))
        z = np.zeros(n)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            Phi[keep] = self.basis.expand(np.ascontiguousarray(X[keep]))
            z[keep] = self.transform.forward(y[keep])
        bad = keep & ~(np.isfinite(Phi).all(axis=1) & np.isfinite(z))
        hold[bad] = NOT_FINITE
        Phi[bad] = 0.0
        z[bad] = 0.0
        return Phi, z, hold

    # learning -----------------------------------------------------------------
    def learn(self, X: Any, y: Any) -> LearnResult:
        """One step per row of X (n, d) raw inputs with references y (n,), in order.

        Raises ``InputError`` (and changes nothing) when any sample is invalid. When a
        sample raises the drift alarm, the result keeps the state from just before it.
        """
        Xa, ya = self._samples(X, y)
        n = Xa.shape[0]
        Phi, z, hold = self._rows(Xa, ya)
        s = self.s
        before_state = int(s.ds[DS_STATE])
        before_n = s.n_samples
        before_tol = s.tolerance_state
        size = self.basis.size
        cov = s.cov if s.cov is not None else np.zeros((size, size))
        b = s.info_b if s.info_b is not None else np.zeros(size)
        out_r = np.empty(n)
        out_status = np.empty(n, dtype=np.int8)
        out_state = np.empty(n, dtype=np.int8)
        out_stat = np.empty(n)
        alarm_at = -1
        if n:
            w, P, st, ds = np.empty_like(s.w), np.empty_like(cov), np.empty_like(s.st), np.empty_like(s.ds)
            alarm_at = learn_batch(Phi, z, ya, hold, s.w, s.w_ref_or_zero(), s.w_ref is not None, cov, b,
                                   self.ip, self.sp, self.lp, self.dp, s.st, s.ds, s.change_w,
                                   out_r, out_status, out_state, out_stat, w, P, st, ds)
            if s.cov is not None:
                s.cov = cov
            if s.info_b is not None and s.st[ST_INIT] == 0.0:
                s.info_b = None  # the RLS has its first solution
        before_alarm = None
        if alarm_at >= 0:
            snap = ModelState(w, None if s.w_ref is None else s.w_ref.copy(), None if s.cov is None else P, st, ds,
                              before_n + alarm_at, before_tol, s.max_curve_change, np.stack([w, w]),
                              None, s.service)
            if alarm_at > 0:  # the state as learning the samples before the alarm alone leaves it
                snap.tolerance_state, mcc = self._tolerance(w)
                if snap.tolerance_state is not None:
                    snap.max_curve_change = mcc
            before_alarm = snap.to_dict()
        s.n_samples += n
        events: list[dict[str, Any]] = []
        prev = before_state
        for i in np.flatnonzero(np.diff(np.concatenate([[before_state], out_state]))):
            cur = int(out_state[i])
            events.append({"kind": f"drift_{STATES[cur]}", "index": int(i), "from": STATES[prev],
                           "statistic": float(out_stat[i])})
            prev = cur
        for i in np.flatnonzero(out_status == GUARD):
            events.append({"kind": "guard", "index": int(i),
                           "message": "unstable step not applied; step size halved"
                           if self.config["learner"]["kind"] == "sgd"
                           else "unstable step not applied"})
        if n:
            self._check_tolerance()
            if s.tolerance_state != before_tol and s.tolerance_state is not None:
                events.append({"kind": s.tolerance_state, "index": n - 1,
                               "max_curve_change": s.max_curve_change})
        return LearnResult(out_r, [STATUS_NAMES[int(c)] for c in out_status],
                           [STATES[int(c)] for c in out_state], out_stat, events,
                           alarm_at if alarm_at >= 0 else None, before_alarm)

    def fit_closed_form(self, X: Any, y: Any) -> dict[str, Any]:
        """Least-squares calibration on points X (n, d), y (n,); replaces the weights,
        resets the learner's clock and the drift detector, and makes this curve the
        reference for the tolerance check. Returns the fit report."""
        Xa, ya = self._samples(X, y)
        Phi = self.basis.expand(Xa)
        z = self.transform.forward(ya)
        fit = fit_least_squares(Phi, z, has_intercept=self.basis.has_intercept)
        old = self.s.w.copy()
        s = self.s
        s.w = fit.weights.copy()
        s.w_ref = fit.weights.copy()
        s.cov = fit.cov_unscaled.copy()
        yhat, _ = self.transform.inverse(Phi @ fit.weights)
        out_resid = ya - yhat
        s.st[ST_T] = 0.0
        s.st[ST_SCALE] = 1.0
        # the fit's residual s.d. serves the uncertainty until samples arrive; the warm-up
        # starts again, because residuals in service are seldom as small as on the bench
        s.st[ST_RN] = 0.0
        s.st[ST_RVAR] = 0.0
        s.st[ST_FVAR] = fit.residual_sd**2 if fit.dof > 0 else 0.0
        s.st[ST_FDOF] = float(fit.dof)
        s.st[ST_ON] = float(fit.n)
        s.st[ST_OMS] = float(np.mean(out_resid**2))
        # the drift watch starts afresh on this fit's curve: its residuals, its scale
        s.st[ST_EN] = s.st[ST_EMEAN] = s.st[ST_EVAR] = 0.0
        s.info_b, s.st[ST_INIT] = None, 0.0
        self._arm(fit.n)
        s.service = "in_service"
        if self.config["learner"]["kind"] == "rls":
            self._bound_trace()
        s.tolerance_state = "ok" if self.config["drift"]["tolerance"] is not None else None
        s.max_curve_change = 0.0
        change = self.max_curve_difference(old)
        report: dict[str, Any] = {
            "weights": fit.weights.tolist(),
            "weight_sd": _nan_to_none(fit.weight_sd),
            "residual_sd": _float_or_none(fit.residual_sd),
            "rmse_output": float(np.sqrt(np.mean(out_resid**2))),
            "r_squared": _float_or_none(fit.r_squared),
            "n": fit.n,
            "max_curve_change": change if np.isfinite(change) else None,
        }
        report.update(self.raw_coefficients(fit.residual_sd))
        return report

    def raw_coefficients(self, residual_sd: float | None = None) -> dict[str, Any]:
        """Coefficients in raw units where the basis has such a form (with s.d. when a
        covariance and residual s.d. are known). ``poly_coefficients`` for one-input poly."""
        T = self.basis.raw_map()
        if T is None:
            return {}
        c = T @ self.s.w
        sd = residual_sd if residual_sd is not None else self.residual_sd()
        if self.s.cov is not None and sd is not None and np.isfinite(sd):
            csd = _nan_to_none(sd * np.sqrt(np.maximum(np.diag(T @ self.s.cov @ T.T), 0.0)))
        else:
            csd = None
        out: dict[str, Any] = {"raw_terms": self.basis.raw_terms(), "raw_coefficients": c.tolist(),
                               "raw_coefficient_sd": csd}
        if isinstance(self.basis, PolyBasis) and self.scaler.d == 1:
            out["poly_coefficients"] = c.tolist()
            out["poly_coefficient_sd"] = csd
        return out

    # prediction ---------------------------------------------------------------
    def residual_sd_dof(self) -> tuple[float | None, float]:
        """(s, dof): the residual s.d. in the fitted space, the last fit's residual variance
        pooled with that of the samples since (counted up to the estimate's window), and
        its degrees of freedom; (None, 0) when there is none yet."""
        st = self.s.st
        n = min(st[ST_RN], RESIDUAL_WINDOW)
        dof = st[ST_FDOF] + n
        if dof <= 0:
            return None, 0.0
        return float(np.sqrt((st[ST_FDOF] * st[ST_FVAR] + n * st[ST_RVAR]) / dof)), float(dof)

    def residual_sd(self) -> float | None:
        return self.residual_sd_dof()[0]

    def prediction(self, X: Any) -> Prediction:
        """Calibrated values at raw inputs X (n, d) with their uncertainty budget; raises
        ``InputError`` for inputs that are not finite numbers of the right shape."""
        return predict_values(self, self.scaler.check(X))

    def predict(self, X: Any) -> tuple[Array, Array]:
        """Calibrated values y (n,) and combined standard uncertainties u (n,) in output
        units for raw inputs X (n, d); NaN where a value is withheld or unknown."""
        p = self.prediction(X)
        return p.y, p.u

    def out_of_range(self, X: Any) -> NDArray[np.bool_]:
        return self.scaler.out_of_range(self.scaler.check(X))

    def _grid(self) -> tuple[Array, Array]:
        """The standard grid, (g, d) raw inputs, and its basis (g, p), made once."""
        if self._grid_x is None or self._grid_phi is None:
            self._grid_x = self.scaler.grid(CURVE_GRID)
            self._grid_phi = self.basis.expand(self._grid_x)
        return self._grid_x, self._grid_phi

    def curve_values(self, weights: Array) -> Array:
        """The curve with the given weights on the standard grid, output units."""
        y, _ = self.transform.inverse(self._grid()[1] @ weights)
        return y

    def _gap(self, weights: Array) -> Array:
        """|f_now(x) - f_other(x)| on the standard grid (g,), output units (NaN where both
        curves overflow alike)."""
        with np.errstate(invalid="ignore"):
            return np.abs(self.curve_values(self.s.w) - self.curve_values(weights))

    def max_curve_difference(self, weights: Array) -> float:
        """Largest |f_now(x) - f_other(x)| over the input range, output units (not finite
        when either curve is not finite somewhere on the grid)."""
        return float(np.max(self._gap(weights)))

    def curve_difference(self, weights: Array) -> tuple[float | None, Array | None, int]:
        """``max_curve_difference`` among the grid points where both curves are finite, with
        the raw inputs x (d,) where it is and how many grid points were left out as not
        finite; ``(None, None, g)`` when no point is finite in both."""
        gap = self._gap(weights)
        finite = np.isfinite(gap)
        left_out = int(gap.size - np.count_nonzero(finite))
        if left_out == gap.size:
            return None, None, left_out
        i = int(np.argmax(np.where(finite, gap, -np.inf)))  # the first of equal largest
        return float(gap[i]), self._grid()[0][i].copy(), left_out

    def set_reference(self) -> None:
        """Accept the current curve as the reference for the drift watch, the tolerance
        check and the l2 pull; the watch restarts on it."""
        s = self.s
        s.w_ref = s.w.copy()
        s.tolerance_state = "ok" if self.config["drift"]["tolerance"] is not None else None
        s.max_curve_change = 0.0
        s.st[ST_EN] = s.st[ST_EMEAN] = s.st[ST_EVAR] = 0.0
        s.reset_detector(keep_alarm=True, baseline=False)

    def _arm(self, n_points: int) -> None:
        """Start the drift watch on the reference curve of a fit of ``n_points`` points: its
        baseline (Page-Hinkley's running mean) starts at 0 with a prior weight of
        ``BASELINE_PRIOR`` samples and may explain a bias of the reference fit of at most
        three of its standard errors, 3 sqrt(M / n) in residual s.d. (M / n: the points'
        mean leverage); a larger offset than the fit can explain always raises the alarm."""
        s = self.s
        s.reset_detector(baseline=False)
        s.ds[DS_N] = max(n_points, 1) / self.basis.size
        s.ds[DS_BOUND] = 3.0 * np.sqrt(self.basis.size / max(n_points, 1))

    def acknowledge(self) -> None:
        """A technician has seen the drift state: the alarm (or warning) clears and the
        watch restarts, its baseline learnt again from the next samples, so only a further
        change raises it again."""
        self.s.reset_detector(baseline=False)

    def set_service(self, state: str) -> None:
        """``in_service`` or ``out_of_service``: out of service, samples are stored but
        not learned nor watched."""
        if state not in ("in_service", "out_of_service"):
            raise ConfigError(f"unknown service state {state!r}", field="state")
        self.s.service = state

    def take_curve(self, other: ChannelModel, *, set_reference: bool) -> ChannelModel:
        """A rollback: ``other``'s curve and learner state under this model's lifecycle (its
        reference curve and drift watch, service state, sample count), unless ``set_reference``
        makes the restored curve the new reference. ``other`` has this model's basis."""
        state = other.s.copy()
        s = self.s
        state.n_samples = s.n_samples
        state.service = s.service
        state.ds, state.change_w = s.ds.copy(), np.stack([state.w, state.w])
        for k in (ST_EN, ST_EMEAN, ST_EVAR, ST_FVAR, ST_FDOF, ST_ACC, ST_REJ, ST_GUARD, ST_HELD):
            state.st[k] = s.st[k]
        restored = ChannelModel(other.config, state)
        if set_reference:
            restored.set_reference()
        else:
            state.w_ref = None if s.w_ref is None else s.w_ref.copy()
            restored._check_tolerance()
        return restored

    def _check_tolerance(self) -> None:
        self.s.tolerance_state, mcc = self._tolerance(self.s.w)
        if self.s.tolerance_state is not None:
            self.s.max_curve_change = mcc

    def _tolerance(self, w: Array) -> tuple[str | None, float | None]:
        """(tolerance state, largest change from the reference curve) for weights w."""
        tol = self.config["drift"]["tolerance"]
        w_ref = self.s.w_ref
        if tol is None or w_ref is None:
            return None, None
        change = float(np.max(np.abs(self.curve_values(w) - self.curve_values(w_ref))))
        ok = np.isfinite(change) and change <= tol
        return "ok" if ok else "out_of_tolerance", change if np.isfinite(change) else None

    # what the model knows, by name -----------------------------------------------------
    @property
    def weights(self) -> Array:
        """(M,) current weights, in the basis's scaled space (read only)."""
        w = self.s.w.view()
        w.flags.writeable = False
        return w

    @property
    def n_samples(self) -> int:
        """Samples seen, learned or not."""
        return self.s.n_samples

    @property
    def n_accepted(self) -> int:
        return int(self.s.st[ST_ACC])

    @property
    def n_rejected(self) -> int:
        """Samples not learnt: outliers, guarded (unstable) steps, and those held back (out
        of range, not finite, out of service)."""
        return int(self.s.st[ST_REJ] + self.s.st[ST_GUARD] + self.s.st[ST_HELD])

    @property
    def drift_state(self) -> str:
        """``ok``, ``warning`` or ``alarm`` (an alarm stays until the drift watch restarts)."""
        return STATES[int(self.s.ds[DS_STATE])]

    @property
    def in_alarm(self) -> bool:
        return self.drift_state == "alarm"

    @property
    def drift_statistic(self) -> float:
        """The detector's statistic now, in its own units (compare with warning / alarm)."""
        return float(detector_statistic(int(self.ip[IP_DETECTOR]), self.dp, self.s.ds))

    @property
    def tolerance_state(self) -> str | None:
        """``ok`` / ``out_of_tolerance`` against the reference curve; None without a check."""
        return self.s.tolerance_state

    @property
    def max_curve_change(self) -> float | None:
        """Largest |f_now - f_ref| over the input range at the last check, output units."""
        return self.s.max_curve_change

    @property
    def rmse(self) -> float | None:
        """Running root mean square of the accepted samples' residuals, output units."""
        return float(np.sqrt(self.s.st[ST_OMS])) if self.s.st[ST_ON] > 0 else None

    @property
    def warmed_up(self) -> bool:
        """The outlier gate works: the residual s.d. rests on ``WARMUP`` degrees of freedom."""
        return self.residual_sd_dof()[1] >= WARMUP

    @property
    def calibrated(self) -> bool:
        """The channel has a curve: a calibration, or a learnt sample (an RLS learner: its
        first solution)."""
        return self.s.w_ref is not None or (self.s.st[ST_ACC] > 0 and self.s.info_b is None)

    @property
    def service(self) -> str:
        return self.s.service

    def quality(self) -> dict[str, Any]:
        """What a data user should know about every value this model gives."""
        return {"calibrated": self.calibrated, "drift": self.drift_state,
                "tolerance": self.tolerance_state or "ok", "service": self.s.service,
                "warming_up": not self.warmed_up}

    def summary(self) -> dict[str, Any]:
        """Counts, rmse (output units) and drift state for ``GET /v1/channels/{id}``."""
        return {
            "n_samples": self.n_samples,
            "n_accepted": self.n_accepted,
            "n_rejected": self.n_rejected,
            "rmse": self.rmse,
            "residual_sd": self.residual_sd(),
            "drift": {
                "state": self.drift_state,
                "statistic": self.drift_statistic,
                "warning": self.config["drift"]["warning"],
                "alarm": self.config["drift"]["alarm"],
                "tolerance_state": self.tolerance_state,
                "max_curve_change": self.max_curve_change,
            },
            "warmed_up": self.warmed_up,
        }


def _watch(drift: dict[str, Any]) -> dict[str, Any]:
    """The drift settings that shape the detector's statistic (not the tolerance)."""
    return {k: v for k, v in drift.items() if k != "tolerance"}


def _float_or_none(v: float) -> float | None:
    return float(v) if np.isfinite(v) else None


def _nan_to_none(a: Array) -> list[float | None] | None:
    if not np.isfinite(a).all():
        return None
    return [float(v) for v in a]
