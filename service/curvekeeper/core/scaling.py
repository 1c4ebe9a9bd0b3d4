"""Affine input scaling from each input's declared range to [-1, 1].

Learning rates then do not depend on the units of the raw signal.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .errors import InputError

Array = NDArray[np.float64]


class InputScaler:
    """Maps raw inputs ``X : (n, d)`` to ``S : (n, d)`` with ``s = a * x + b``.

    Parameters
    ----------
    inputs : the channel's ``inputs`` list (each with ``min`` < ``max``, raw units).
    """

    def __init__(self, inputs: Sequence[dict[str, Any]]) -> None:
        lo = np.array([float(i["min"]) for i in inputs])
        hi = np.array([float(i["max"]) for i in inputs])
        self.lo = lo
        self.hi = hi
        self.a = 2.0 / (hi - lo)
        self.b = -(hi + lo) / (hi - lo)
        self.d = len(inputs)

    def check(self, X: Any) -> Array:
        """Return ``X`` as a C-contiguous float array of shape (n, d) or raise ``InputError``.

        A single input may be given as shape (n,).
        """
        try:
            arr = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError("inputs must be numbers", field="x") from exc
        if arr.ndim == 1 and self.d == 1:
            arr = arr.reshape(-1, 1)
        elif arr.ndim == 1 and arr.size == 0:
            arr = arr.reshape(0, self.d)
        if arr.ndim != 2 or arr.shape[1] != self.d:
            raise InputError(
                f"each sample needs {self.d} input value(s), in the channel's input order",
                field="x",
            )
        bad = ~np.isfinite(arr).all(axis=1)
        if bad.any():
            raise InputError(
                f"input value at position {int(np.argmax(bad))} is not a finite number",
                field="x",
                details={"index": int(np.argmax(bad))},
            )
        return np.ascontiguousarray(arr)

    def scale(self, X: Array) -> Array:
        """Scaled inputs, (n, d); values outside the range fall outside [-1, 1]."""
        return np.asarray(X * self.a + self.b, dtype=np.float64)

    def out_of_range(self, X: Array) -> NDArray[np.bool_]:
        """(n,) True where any input lies outside its declared [min, max]."""
        flags: NDArray[np.bool_] = np.asarray(((self.lo > X) | (self.hi < X)).any(axis=1), dtype=np.bool_)
        return flags

    def grid(self, points: int) -> Array:
        """A grid over the declared ranges, (g, d); see ``box_grid``."""
        return box_grid(self.lo, self.hi, points)


def box_grid(lo: Array, hi: Array, points: int) -> Array:
    """A grid over the box [lo, hi] (each (d,), raw units), (g, d): ``points`` per input for
    one input, fewer per axis for several so the grid stays near ``points`` ... 4096 points.
    An input with lo == hi gives that one value on its axis."""
    d = lo.shape[0]
    if d == 1:
        return np.linspace(lo[0], hi[0], points).reshape(-1, 1)
    per_axis = max(3, int(round(min(points, 4096) ** (1.0 / d))))
    axes = [np.linspace(a, b, per_axis) for a, b in zip(lo, hi, strict=True)]
    mesh = np.meshgrid(*axes, indexing="ij")
    return np.stack([m.ravel() for m in mesh], axis=1)
