"""Curve comparisons on a channel's standard grid: differences between curves and the
tolerance check against the reference curve. Part of ``ChannelModel``."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from .facts import ModelParts

if TYPE_CHECKING:
    from .prediction import Prediction

Array = NDArray[np.float64]

CURVE_GRID = 201  # points over the input range for curve comparisons


class CurveComparison(ModelParts):
    """Curve values and differences over the standard grid (``CURVE_GRID`` points per input)."""

    _grid_x: Array | None
    _grid_phi: Array | None

    if TYPE_CHECKING:  # given by ChannelModel
        def prediction(self, X: Array) -> Prediction: ...

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

    def reference_difference(self) -> tuple[float, float | None] | None:
        """(largest |f_now - f_ref| over the input range, the current curve's standard
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
        """(tolerance state, largest change from the reference curve) for weights w."""
        tol = self.config["drift"]["tolerance"]
        w_ref = self.s.w_ref
        if tol is None or w_ref is None:
            return None, None
        change = float(np.max(np.abs(self.curve_values(w) - self.curve_values(w_ref))))
        ok = np.isfinite(change) and change <= tol
        return "ok" if ok else "out_of_tolerance", change if np.isfinite(change) else None

