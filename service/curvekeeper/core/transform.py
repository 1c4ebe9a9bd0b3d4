"""Output transforms: the curve is fitted to z = g(y) and mapped back for predictions.

``none``: z = y.  ``reciprocal``: z = 1 / (y + offset) (Steinhart-Hart is linear
in 1/T).  ``log``: z = ln(y + offset) (power-law sensors).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .errors import InputError

Array = NDArray[np.float64]

KINDS = {"none": 0, "reciprocal": 1, "log": 2}


class OutputTransform:
    def __init__(self, kind: str, offset: float) -> None:
        self.kind = kind
        self.code = KINDS[kind]
        self.offset = float(offset)

    def forward(self, y: Array) -> Array:
        """Reference values in output units, (n,) -> transformed targets z, (n,)."""
        if self.code == 0:
            return y.copy()
        shifted = y + self.offset
        if not (shifted > 0).all():
            i = int(np.argmax(~(shifted > 0)))
            raise InputError(
                f"reference value at position {i} gives y + offset <= 0, "
                f"which the {self.kind} transform cannot take",
                field="y",
                details={"index": i},
            )
        if self.code == 1:
            return 1.0 / shifted
        return np.log(shifted)

    def inverse(self, z: Array) -> tuple[Array, Array]:
        """Transformed values z, (n,) -> (y, |dy/dz|) in output units, (n,) each."""
        if self.code == 0:
            return z.copy(), np.ones_like(z)
        with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
            if self.code == 1:
                y = 1.0 / z - self.offset
                return y, 1.0 / (z * z)
            e = np.exp(z)
            return e - self.offset, e
