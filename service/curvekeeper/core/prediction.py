"""A prediction with its uncertainty budget (GUM) and the reasons a value is withheld.

Components, per predicted value (``uncertainty.py`` combines them):

- ``curve and scatter`` (Type A): s sqrt(1 + phi' P phi), s the residual s.d. (the
  fit's pooled with the samples') and phi' P phi the curve's own share from its
  parameter covariance P (none for an SGD learner taught from scratch, whose prior
  residuals already hold it); in the fitted space with sensitivity |dy/dz|, and the
  pooled degrees of freedom;
- ``reference`` (Type B): the reference instrument's U / k from its certificate (normal;
  for a rectangular or triangular distribution U is the half-width and k its divisor);
- ``resolution`` (Type B, rectangular), per input with a declared resolution:
  res / sqrt(12) in input units with sensitivity dy/dx (a central difference).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from .uncertainty import Budget, Component, budget, from_expanded, rectangular

if TYPE_CHECKING:
    from .model import ChannelModel

Array = NDArray[np.float64]

OUTSIDE_DOMAIN = "outside_domain"  # the transform's inverse has no physical value there
NOT_FINITE = "not_finite"  # the curve overflows there


@dataclass
class Prediction:
    """n values: y (NaN where withheld), reason (None or why withheld), the budget's u, U,
    k, dof (inf: infinite) and out_of_range flags, all (n,); u is NaN before the channel
    has a residual s.d."""

    y: Array
    reason: list[str | None]
    u: Array
    U: Array
    k: Array
    dof: Array
    out_of_range: NDArray[np.bool_]
    budget: Budget | None


def predict(model: ChannelModel, X: Array) -> Prediction:
    """The prediction at raw inputs X (n, d), checked by the model."""
    cfg = model.config
    Phi = model.basis.expand(X)
    zhat = Phi @ model.s.w
    y, slope = model.transform.inverse(zhat)
    reason: list[str | None] = [None] * len(y)
    withheld = ~np.isfinite(y)
    if model.transform.code == 1:
        withheld |= ~(zhat > 0.0)  # 1 / z <= 0: at or below the offset's zero (absolute zero)
    for i in np.flatnonzero(withheld):
        reason[i] = OUTSIDE_DOMAIN if model.transform.code == 1 and not zhat[i] > 0.0 else NOT_FINITE
    y = np.where(withheld, np.nan, y)
    slope = np.where(withheld, np.nan, slope)
    sd, dof = model.residual_sd_dof()
    comps: list[Component] = []
    if sd is not None:
        quad = np.zeros(len(y))
        if model.s.cov is not None and model.s.info_b is None:
            quad = np.maximum(((Phi @ model.s.cov) * Phi).sum(axis=1), 0.0)
        # one Type A component: both parts rest on the same s, so Welch-Satterthwaite (which
        # assumes independent estimates) must see them as one with s's degrees of freedom
        comps.append(Component("curve and scatter", "A", "t", sd * np.sqrt(1.0 + quad), slope, dof))
    ref = cfg.get("reference")
    if ref is not None:
        comps.append(Component("reference", "B", ref.get("distribution", "normal"),
                               from_expanded(ref["expanded_uncertainty"], ref["coverage_factor"])))
    for j, spec in enumerate(cfg["inputs"]):
        if spec.get("resolution"):
            comps.append(Component(f"resolution of {spec['name']}", "B", "rectangular",
                                   rectangular(spec["resolution"]), _slope_in(model, X, j)))
    n = len(y)
    if sd is None or not comps:
        nan = np.full(n, np.nan)
        return Prediction(y, reason, nan, nan, nan.copy(), nan.copy(), model.scaler.out_of_range(X), None)
    b = budget(comps)
    U, k = b.expanded(cfg.get("coverage", 0.95), cfg.get("coverage_factor"))
    return Prediction(y, reason, b.u, U, k, b.dof, model.scaler.out_of_range(X), b)


def _slope_in(model: ChannelModel, X: Array, j: int) -> Array:
    """dy/dx_j (n,) at X by a central difference of 1e-6 of input j's span."""
    h = 1e-6 * float(model.scaler.hi[j] - model.scaler.lo[j])
    up, down = X.copy(), X.copy()
    up[:, j] += h
    down[:, j] -= h
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        yu, _ = model.transform.inverse(model.basis.expand(up) @ model.s.w)
        yd, _ = model.transform.inverse(model.basis.expand(down) @ model.s.w)
        return np.asarray((yu - yd) / (2.0 * h))
