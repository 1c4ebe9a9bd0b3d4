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

from .basis import Basis, make_basis
from .comparison import CURVE_GRID, CurveComparison
from .config import MUTABLE, Config, curve_form
from .drift import DS_STATE, STATES, detector_params
from .errors import ConfigError, InputError, StateError
from .facts import RESIDUAL_WINDOW, WARMUP, ModelFacts
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
    ST_INIT,
    ST_TRMAX,
    STATUS_NAMES,
    learn_batch,
)
from .lifecycle import Lifecycle
from .prediction import Prediction
from .prediction import predict as predict_values
from .scaling import InputScaler
from .schedules import schedule_params
from .state import ModelState
from .transform import OutputTransform

Array = NDArray[np.float64]

COVARIANCE_BOUND = 10.0  # the RLS trace bound of a channel declared before it was a setting
RANGE_MARGIN = 1.0  # the out-of-range margin of a channel declared before it was a setting

__all__ = ["CURVE_GRID", "MUTABLE", "RESIDUAL_WINDOW", "WARMUP", "ChannelModel", "LearnResult"]


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



class ChannelModel(ModelFacts, CurveComparison, Lifecycle):
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
        self._grid_key: tuple[float, ...] | None = None  # the operating range the grid is on
        self._grid_x: Array | None = None  # the comparison grid, (g, d) raw inputs
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
        if state.get("format", 0) < 4 and model.calibrated:
            # a state from before the spans were kept: until samples come, the curve is
            # compared where it was before, over the whole declared range
            model.s.cal_span = np.stack([model.scaler.lo, model.scaler.hi])
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
        settings (learner, drift, guards) and the inputs' operating ranges, with the same
        learned state; the drift watch restarts when the drift settings change.

        Raises ``ConfigError`` with field ``immutable`` when another setting differs.
        """
        new_form, old_form = curve_form(config), curve_form(self.config)
        fixed = sorted(k for k in set(new_form) | set(old_form) if new_form.get(k) != old_form.get(k))
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
        if (config["drift"]["tolerance"] != self.config["drift"]["tolerance"]
                or config["inputs"] != self.config["inputs"]):  # the operating range moved
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
        far = ((self.scaler.lo - margin * span > X) | (self.scaler.hi + margin * span < X)).any(axis=1)
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
        seen = (hold != OUT_OF_RANGE) & (hold != NOT_FINITE)  # inputs the operating range spans
        before_alarm = None
        if alarm_at >= 0:
            snap = ModelState(w, None if s.w_ref is None else s.w_ref.copy(), None if s.cov is None else P, st, ds,
                              before_n + alarm_at, before_tol, s.max_curve_change, np.stack([w, w]),
                              None, s.service, s.span, s.cal_span)
            if alarm_at > 0:  # the state as learning the samples before the alarm alone leaves it
                span, s.span = s.span, self._widened(Xa[:alarm_at][seen[:alarm_at]], s.span)
                snap.span = s.span
                snap.tolerance_state, mcc = self._tolerance(w)
                if snap.tolerance_state is not None:
                    snap.max_curve_change = mcc
                s.span = span
            before_alarm = snap.to_dict()
        s.span = self._widened(Xa[seen], s.span)
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

def _watch(drift: dict[str, Any]) -> dict[str, Any]:
    """The drift settings that shape the detector's statistic (not the tolerance)."""
    return {k: v for k, v in drift.items() if k != "tolerance"}
