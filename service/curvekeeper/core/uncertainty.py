"""Standard uncertainty of a prediction.

u_z^2 = s^2 (1 + phi' P phi) in the fitted space, s the residual s.d. and P the
unscaled parameter covariance ((Phi' Phi)^-1 after a fit; RLS keeps it current);
without P, u_z = s. Mapped to output units to first order: u_y = |dy/dz| u_z.
Expanded uncertainty U = k u, with coverage factor k (2 by default, about 95 %
for a normal distribution).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


def standard_uncertainty(Phi: Array, s2: float, P: Array | None) -> Array:
    """(n,) u in the fitted space for design rows Phi (n, M); NaN when s2 is unknown."""
    n = Phi.shape[0]
    if not np.isfinite(s2):
        return np.full(n, np.nan)
    if P is None:
        return np.full(n, np.sqrt(s2))
    quad = ((Phi @ P) * Phi).sum(axis=1)
    return np.asarray(np.sqrt(s2 * (1.0 + np.maximum(quad, 0.0))))
