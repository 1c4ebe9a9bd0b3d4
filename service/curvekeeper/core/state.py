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

from .drift import DS_MEAN, DS_N, DS_SIZE, DS_STATE, STATES
from .errors import StateError
from .learners import ST_SCALE, ST_SIZE

Array = NDArray[np.float64]

STATE_FORMAT = 2  # 1 carried the channel's config as well
RUNNING_NAMES = (
    "t", "step_scale", "residual_n", "residual_var", "output_n", "output_ms",
    "n_accepted", "n_outliers", "n_guarded", "fit_var", "fit_dof",
)
DETECTOR_NAMES = ("a", "b", "mean", "n", "state")


@dataclass
class ModelState:
    """w (M,) weights; w_ref (M,) reference weights or None; cov (M, M) unscaled
    parameter covariance or None; st running statistics; ds detector state."""

    w: Array
    w_ref: Array | None
    cov: Array | None
    st: Array
    ds: Array
    n_samples: int
    tolerance_state: str | None
    max_curve_change: float | None

    @classmethod
    def fresh(cls, size: int) -> ModelState:
        st = np.zeros(ST_SIZE)
        st[ST_SCALE] = 1.0
        return cls(np.zeros(size), None, None, st, np.zeros(DS_SIZE), 0, None, None)

    def copy(self) -> ModelState:
        return ModelState(self.w.copy(), None if self.w_ref is None else self.w_ref.copy(),
                          None if self.cov is None else self.cov.copy(), self.st.copy(), self.ds.copy(),
                          self.n_samples, self.tolerance_state, self.max_curve_change)

    def w_ref_or_zero(self) -> Array:
        return self.w_ref if self.w_ref is not None else np.zeros_like(self.w)

    def reset_detector(self) -> None:
        mean, n = self.ds[DS_MEAN], self.ds[DS_N]
        self.ds[:] = 0.0
        self.ds[DS_MEAN], self.ds[DS_N] = mean, n  # Page-Hinkley keeps its running mean of the residuals

    def to_dict(self) -> dict[str, Any]:
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
        }

    @classmethod
    def from_dict(cls, d: Any) -> ModelState:
        try:
            if not isinstance(d, dict) or d.get("format") != STATE_FORMAT:
                raise StateError(f"unknown model state format (expected {STATE_FORMAT})")
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
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"damaged model state: {exc}") from exc
        return cls(w, w_ref, cov, st, ds, n, tol, mcc)


def _vector(v: Any, name: str, size: int | None = None) -> Array:
    a = np.array(v, dtype=np.float64)
    if a.ndim != 1 or (size is not None and a.shape[0] != size):
        raise StateError(f"{name} has the wrong shape")
    if not all(math.isfinite(x) for x in a.tolist()):
        raise StateError(f"{name} holds a non-finite number")
    return a
