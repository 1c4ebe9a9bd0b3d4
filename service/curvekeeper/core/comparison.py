"""Curve comparisons over a channel's operating range: differences between curves, the
tolerance check against the reference curve, and a fitted-space s.d. in output units.
Part of ``ChannelModel``.

The operating range of an input is where the channel is used, so where its curves are
compared: the declared ``operating_range`` [lo, hi] where the channel has one, else the
span of the samples' input values (those not held back as out of range or not finite,
kept inside [min, max]: ``ModelState.span``), else, before any sample, the span of the
last calibration's points (``ModelState.cal_span``), else the whole declared range.
Every curve difference the service gives (the tolerance check and ``max_curve_change``, a
calibration's change, snapshot differences) is the largest over ``CURVE_GRID`` points on
that range; nothing else computes one.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from .facts import ModelParts
from .scaling import box_grid

if TYPE_CHECKING:
    from .prediction import Prediction

Array = NDArray[np.float64]

CURVE_GRID = 201  # points over the operating range for curve comparisons (per axis: see box_grid)
#: where an input's operating range comes from
SOURCES = ("declared", "samples", "calibration", "input_range")


class CurveComparison(ModelParts):
    """Curve values and differences over the operating range's grid."""

    _grid_key: tuple[float, ...] | None
    _grid_x: Array | None
    _grid_phi: Array | None

    if TYPE_CHECKING:  # given by the other parts of ChannelModel
        def prediction(self, X: Array) -> Prediction: ...
        def residual_sd(self) -> float | None: ...

    def operating_range(self) -> tuple[Array, Array, list[str]]:
        """(lo (d,), hi (d,), source per input): each input's operating range in input
        units, and whether it was ``declared``, is the span of the ``samples``, of the last
        ``calibration``'s points (no sample yet), or the whole ``input_range`` (none known)."""
        lo, hi = self.scaler.lo.copy(), self.scaler.hi.copy()
        source = ["input_range"] * len(lo)
        span, which = (self.s.span, "samples") if self.s.span is not None else (self.s.cal_span, "calibration")
        for j, spec in enumerate(self.config["inputs"]):
            declared = spec.get("operating_range")
            if declared is not None:
                lo[j], hi[j], source[j] = float(declared[0]), float(declared[1]), "declared"
            elif span is not None:
                lo[j], hi[j], source[j] = span[0, j], span[1, j], which
        return lo, hi, source

    def _grid(self) -> tuple[Array, Array]:
        """The operating range's grid, (g, d) raw inputs, and its basis (g, p), made again
        only when the range changes."""
        lo, hi, _ = self.operating_range()
        key = (*lo.tolist(), *hi.tolist())
        if self._grid_x is None or self._grid_phi is None or self._grid_key != key:
            self._grid_x = box_grid(lo, hi, CURVE_GRID)
            self._grid_phi = self.basis.expand(self._grid_x)
            self._grid_key = key
        return self._grid_x, self._grid_phi

    def _widened(self, X: Array, span: Array | None) -> Array | None:
        """``span`` (2, d) widened by the inputs X (n, d), each clipped to its declared range."""
        if X.shape[0] == 0:
            return None if span is None else span.copy()
        Xc = np.clip(X, self.scaler.lo, self.scaler.hi)
        lo, hi = Xc.min(axis=0), Xc.max(axis=0)
        if span is None:
            return np.stack([lo, hi])
        return np.stack([np.minimum(span[0], lo), np.maximum(span[1], hi)])

    def curve_values(self, weights: Array) -> Array:
        """The curve with the given weights on the operating range's grid, output units."""
        y, _ = self.transform.inverse(self._grid()[1] @ weights)
        return y

    def _gap(self, weights: Array, base: Array | None = None) -> Array:
        """|f_base(x) - f_other(x)| on the grid (g,), output units, ``base`` the current
        weights unless given (NaN where both curves overflow alike)."""
        with np.errstate(invalid="ignore"):
            return np.abs(self.curve_values(self.s.w if base is None else base) - self.curve_values(weights))

    def max_curve_difference(self, weights: Array) -> float:
        """Largest |f_now(x) - f_other(x)| over the operating range, output units (not
        finite when either curve is not finite somewhere on the grid)."""
        return float(np.max(self._gap(weights)))

    def curve_difference(self, weights: Array, base: Array | None = None) -> tuple[float | None, Array | None, int]:
        """``max_curve_difference`` among the grid points where both curves are finite, with
        the raw inputs x (d,) where it is and how many grid points were left out as not
        finite; ``(None, None, g)`` when no point is finite in both. ``base``: compare with
        these weights (of this model's basis, e.g. a snapshot's) instead of the current ones,
        still over this model's operating range."""
        gap = self._gap(weights, base)
        finite = np.isfinite(gap)
        left_out = int(gap.size - np.count_nonzero(finite))
        if left_out == gap.size:
            return None, None, left_out
        i = int(np.argmax(np.where(finite, gap, -np.inf)))  # the first of equal largest
        return float(gap[i]), self._grid()[0][i].copy(), left_out

    def reference_difference(self) -> tuple[float, float | None] | None:
        """(largest |f_now - f_ref| over the operating range, the current curve's standard
        uncertainty u at that input), output units, by ``curve_difference`` against the
        reference curve; u None when unknown; None without a reference curve or where no
        grid point is finite in both curves."""
        if self.s.w_ref is None:
            return None
        gap, x, _ = self.curve_difference(self.s.w_ref)
        if gap is None or x is None:
            return None
        u = float(self.prediction(x.reshape(1, -1)).u[0])
        return gap, u if np.isfinite(u) else None

    def _check_tolerance(self) -> None:
        self.s.tolerance_state, mcc = self._tolerance(self.s.w)
        if self.s.tolerance_state is not None:
            self.s.max_curve_change = mcc

    def _tolerance(self, w: Array) -> tuple[str | None, float | None]:
        """(tolerance state, largest change from the reference curve over the operating
        range, output units) for weights w."""
        tol = self.config["drift"]["tolerance"]
        w_ref = self.s.w_ref
        if tol is None or w_ref is None:
            return None, None
        with np.errstate(invalid="ignore"):
            change = float(np.max(np.abs(self.curve_values(w) - self.curve_values(w_ref))))
        ok = np.isfinite(change) and change <= tol
        return "ok" if ok else "out_of_tolerance", change if np.isfinite(change) else None

    def output_sd(self, sd: float | None) -> float | None:
        """A fitted-space s.d. in output units, to first order sd |dy/dz| (GUM 5.1.2), at
        its largest over the operating range (|dy/dz| varies along the curve); ``sd`` itself
        for an untransformed output; None without ``sd`` or a curve value on the range."""
        if sd is None or self.transform.code == 0:
            return sd
        z = self._grid()[1] @ self.s.w
        y, slope = self.transform.inverse(z)
        valid = np.isfinite(y) & np.isfinite(slope)
        if self.transform.code == 1:
            valid &= z > 0.0  # 1 / z <= 0: no physical value (prediction withholds it too)
        return float(sd * np.max(slope[valid])) if valid.any() else None

    def residual_sd_output(self) -> float | None:
        """The residual s.d. (``residual_sd``, fitted space) in output units: see ``output_sd``."""
        return self.output_sd(self.residual_sd())
