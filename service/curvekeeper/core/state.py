"""A model's learned state and its versioned, JSON-safe dict form (the configuration is
not part of it: the channel keeps that once).

Floats go through Python's shortest round-trip repr in JSON, so a state written
and read back restores every weight to the last bit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .drift import ALARM, DS_MEAN, DS_N, DS_SIZE, DS_STATE, STATES
from .errors import StateError
from .learners import ST_SCALE, ST_SIZE

Array = NDArray[np.float64]

STATE_FORMAT = 4  # 1 carried the channel's config as well; 2 had no reference residuals; 3 no input span
READS = (2, 3, 4)  # formats read: an older state gets the new fields' starting values
RUNNING_NAMES = (
    "t", "step_scale", "residual_n", "residual_var", "output_n", "output_ms",
    "n_accepted", "n_outliers", "n_guarded", "fit_var", "fit_dof",
    "reference_n", "reference_mean", "reference_var", "trace_bound", "initialising", "n_held", "outlier_run",
    "gate_var",
)
NEW_IN_3 = dict.fromkeys(RUNNING_NAMES[11:], 0.0)
SERVICE_STATES = ("in_service", "out_of_service")
DETECTOR_NAMES = ("a", "b", "mean", "n", "state")


@dataclass
class ModelState:
    """w (M,) weights; w_ref (M,) reference weights (the last calibration's curve) or None;
    cov (M, M) unscaled parameter covariance or None (an RLS learner still initialising
    keeps its information matrix there, and ``info_b`` (M,)); st running statistics; ds
    detector state; change_w (2, M) the weights at the detector's last upward / downward
    restart; ``service`` in or out of service; span (2, d) the lowest and highest input
    values of the samples (those not held back as out of range or not finite), inside the
    declared ranges, or None before any; cal_span (2, d) the same of the last calibration's
    points, or None (in a state from before format 4: the declared ranges, if calibrated)."""

    w: Array
    w_ref: Array | None
    cov: Array | None
    st: Array
    ds: Array
    n_samples: int
    tolerance_state: str | None
    max_curve_change: float | None
    change_w: Array
    info_b: Array | None = None
    service: str = "in_service"
    span: Array | None = None
    cal_span: Array | None = None

    @classmethod
    def fresh(cls, size: int) -> ModelState:
        st = np.zeros(ST_SIZE)
        st[ST_SCALE] = 1.0
        return cls(np.zeros(size), None, None, st, np.zeros(DS_SIZE), 0, None, None, np.zeros((2, size)))

    def copy(self) -> ModelState:
        return ModelState(self.w.copy(), None if self.w_ref is None else self.w_ref.copy(),
                          None if self.cov is None else self.cov.copy(), self.st.copy(), self.ds.copy(),
                          self.n_samples, self.tolerance_state, self.max_curve_change, self.change_w.copy(),
                          None if self.info_b is None else self.info_b.copy(), self.service,
                          None if self.span is None else self.span.copy(),
                          None if self.cal_span is None else self.cal_span.copy())

    def w_ref_or_zero(self) -> Array:
        return self.w_ref if self.w_ref is not None else np.zeros_like(self.w)

    def reset_detector(self, *, keep_alarm: bool = False, baseline: bool = True) -> None:
        """Restart the detector's statistics; Page-Hinkley keeps its running mean unless
        ``baseline`` is false; an alarm stays when ``keep_alarm``."""
        mean, n, state = self.ds[DS_MEAN], self.ds[DS_N], self.ds[DS_STATE]
        self.ds[:] = 0.0
        if baseline:
            self.ds[DS_MEAN], self.ds[DS_N] = mean, n
        if keep_alarm and state == ALARM:
            self.ds[DS_STATE] = ALARM
        self.change_w[:] = self.w

    def to_dict(self) -> dict[str, Any]:
        """The JSON form; raises ``StateError`` rather than write a non-finite number."""
        for name, a in (("weights", self.w), ("ref_weights", self.w_ref), ("cov", self.cov), ("running", self.st),
                        ("detector", self.ds), ("change_weights", self.change_w), ("info_b", self.info_b),
                        ("input_span", self.span), ("calibration_span", self.cal_span)):
            if a is not None and not np.isfinite(a).all():
                raise StateError(f"refusing to store a non-finite number in {name}")
        return {
            "format": STATE_FORMAT,
            "weights": self.w.tolist(),
            "ref_weights": None if self.w_ref is None else self.w_ref.tolist(),
            "cov": None if self.cov is None else self.cov.tolist(),
            "running": dict(zip(RUNNING_NAMES, self.st.tolist(), strict=True)),
            "detector": dict(zip(DETECTOR_NAMES, self.ds.tolist(), strict=True)),
            "n_samples": self.n_samples,
            "tolerance_state": self.tolerance_state,
            "max_curve_change": self.max_curve_change,
            "change_weights": self.change_w.tolist(),
            "info_b": None if self.info_b is None else self.info_b.tolist(),
            "service": self.service,
            "input_span": None if self.span is None else self.span.tolist(),
            "calibration_span": None if self.cal_span is None else self.cal_span.tolist(),
        }

    @classmethod
    def from_dict(cls, d: Any) -> ModelState:
        try:
            if not isinstance(d, dict) or d.get("format") not in READS:
                raise StateError(f"unknown model state format (expected one of {READS})")
            if d["format"] == 2:
                running = {**NEW_IN_3, **d["running"]}
                running["gate_var"] = running["residual_var"]  # the same estimator until format 3
                d = {**d, "running": running, "change_weights": [d["weights"]] * 2,
                     "info_b": None, "service": "in_service"}
            w = _vector(d["weights"], "weights")
            M = w.shape[0]
            w_ref = None if d["ref_weights"] is None else _vector(d["ref_weights"], "ref_weights", M)
            cov = None
            if d["cov"] is not None:
                cov = np.array(d["cov"], dtype=np.float64)
                if cov.shape != (M, M) or not np.isfinite(cov).all():
                    raise StateError("cov must be a finite M x M matrix")
            st = _vector([d["running"][k] for k in RUNNING_NAMES], "running")
            ds = _vector([d["detector"][k] for k in DETECTOR_NAMES], "detector")
            n = d["n_samples"]
            if not isinstance(n, int) or n < 0:
                raise StateError("n_samples must be a non-negative integer")
            tol = d["tolerance_state"]
            if tol not in (None, "ok", "out_of_tolerance"):
                raise StateError("bad tolerance_state")
            if int(ds[DS_STATE]) not in range(len(STATES)):
                raise StateError("bad detector state")
            mcc = d["max_curve_change"]
            mcc = None if mcc is None else float(mcc)
            if mcc is not None and not math.isfinite(mcc):
                raise StateError("max_curve_change is not finite")
            cw = np.array(d["change_weights"], dtype=np.float64)
            if cw.shape != (2, M) or not np.isfinite(cw).all():
                raise StateError("change_weights must be two finite rows of M weights")
            b = None if d["info_b"] is None else _vector(d["info_b"], "info_b", M)
            if d["service"] not in SERVICE_STATES:
                raise StateError("bad service state")
            span = _span(d, "input_span")
            cal_span = _span(d, "calibration_span")
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"damaged model state: {exc}") from exc
        return cls(w, w_ref, cov, st, ds, n, tol, mcc, cw, b, d["service"], span, cal_span)


def _span(d: dict[str, Any], name: str) -> Array | None:
    """A (2, d) span of input values (None before format 4, or when none is known)."""
    if d["format"] < 4 or d[name] is None:
        return None
    span = np.array(d[name], dtype=np.float64)
    if span.ndim != 2 or span.shape[0] != 2 or not np.isfinite(span).all() or (span[0] > span[1]).any():
        raise StateError(f"{name} must be two finite rows, lowest then highest input values")
    return span


def _vector(v: Any, name: str, size: int | None = None) -> Array:
    a = np.array(v, dtype=np.float64)
    if a.ndim != 1 or (size is not None and a.shape[0] != size):
        raise StateError(f"{name} has the wrong shape")
    if not all(math.isfinite(x) for x in a.tolist()):
        raise StateError(f"{name} holds a non-finite number")
    return a
