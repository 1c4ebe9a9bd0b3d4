"""The lifecycle of a channel model: calibration (the reference curve), acknowledgement,
service state and rollback. Part of ``ChannelModel``."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from .basis import PolyBasis, term_name
from .drift import DS_N
from .errors import ConfigError
from .facts import ModelParts
from .learners import (
    ST_ACC,
    ST_EMEAN,
    ST_EN,
    ST_EVAR,
    ST_FDOF,
    ST_FVAR,
    ST_GUARD,
    ST_GVAR,
    ST_HELD,
    ST_INIT,
    ST_OMS,
    ST_ON,
    ST_REJ,
    ST_RN,
    ST_RVAR,
    ST_SCALE,
    ST_T,
)
from .lstsq import fit_least_squares

Array = NDArray[np.float64]

if TYPE_CHECKING:
    from .model import ChannelModel


class Lifecycle(ModelParts):
    """Calibrate, acknowledge, take in or out of service, roll back."""


    if TYPE_CHECKING:  # given by the other parts of ChannelModel
        def max_curve_difference(self, weights: Array) -> float: ...
        def residual_sd(self) -> float | None: ...
        def _samples(self, X: Any, y: Any) -> tuple[Array, Array]: ...
        def _bound_trace(self) -> None: ...
        def _check_tolerance(self) -> None: ...
        def _widened(self, X: Array, span: Array | None) -> Array | None: ...
        def output_sd(self, sd: float | None) -> float | None: ...

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
        s.cal_span = self._widened(Xa, None)
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
        s.st[ST_GVAR] = 0.0
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
            "residual_sd_output": self.output_sd(_float_or_none(fit.residual_sd)),
            "rmse_output": float(np.sqrt(np.mean(out_resid**2))),
            "r_squared": _float_or_none(fit.r_squared),
            "n": fit.n,
            "max_curve_change": change if np.isfinite(change) else None,
        }
        report.update(self.raw_coefficients(fit.residual_sd))
        return report

    def raw_coefficients(self, residual_sd: float | None = None) -> dict[str, Any]:
        """Coefficients in raw units where the basis has such a form (with s.d. when a
        covariance and residual s.d. are known), each term named as people write it
        (``raw_term_names``: ``1``, ``raw^2``, ``ln(raw)``). ``poly_coefficients`` for one-input poly."""
        T = self.basis.raw_map()
        if T is None:
            return {}
        c = T @ self.s.w
        sd = residual_sd if residual_sd is not None else self.residual_sd()
        if self.s.cov is not None and sd is not None and np.isfinite(sd):
            csd = _nan_to_none(sd * np.sqrt(np.maximum(np.diag(T @ self.s.cov @ T.T), 0.0)))
        else:
            csd = None
        terms = self.basis.raw_terms()
        names = [str(i["name"]) for i in self.config["inputs"]]
        out: dict[str, Any] = {"raw_terms": terms, "raw_term_names": [term_name(t, names) for t in terms],
                               "raw_coefficients": c.tolist(),
                               "raw_coefficient_sd": csd}
        if isinstance(self.basis, PolyBasis) and self.scaler.d == 1:
            out["poly_coefficients"] = c.tolist()
            out["poly_coefficient_sd"] = csd
        return out

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
        baseline (Page-Hinkley's running mean) starts at 0 with a prior weight of n / M
        samples (M basis terms), the posterior mean of the fit's own bias in the residuals
        (its variance is about M / n residual variances)."""
        s = self.s
        s.reset_detector(baseline=False)
        s.ds[DS_N] = max(n_points, 1) / self.basis.size

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
        # where the channel was used, and its last calibration's points, stay known
        state.span = None if s.span is None else s.span.copy()
        state.cal_span = None if s.cal_span is None else s.cal_span.copy()
        state.ds, state.change_w = s.ds.copy(), np.stack([state.w, state.w])
        for k in (ST_EN, ST_EMEAN, ST_EVAR, ST_FVAR, ST_FDOF, ST_ACC, ST_REJ, ST_GUARD, ST_HELD):
            state.st[k] = s.st[k]
        restored = type(other)(other.config, state)
        if set_reference:
            restored.set_reference()
        else:
            state.w_ref = None if s.w_ref is None else s.w_ref.copy()
            restored._check_tolerance()
        return restored


def _float_or_none(v: float) -> float | None:
    return float(v) if np.isfinite(v) else None


def _nan_to_none(a: Array) -> list[float | None] | None:
    if not np.isfinite(a).all():
        return None
    return [float(v) for v in a]
