"""Uncertainty of a prediction and its budget (GUM, JCGM 100:2008).

Prediction: u_z^2 = s^2 (1 + phi' P phi) in the fitted space, s the residual s.d. and P
the unscaled parameter covariance ((Phi' Phi)^-1 after a fit; RLS keeps it current);
without P, u_z = s. Mapped to output units to first order: u_y = |dy/dz| u_z.

Budget: each source of uncertainty i gives a standard uncertainty u_i of its input
quantity and a sensitivity c_i (output units per input unit); for uncorrelated inputs
the combined standard uncertainty is u_c^2 = sum (c_i u_i)^2 (GUM 5.1.2, eq. 10), its
effective degrees of freedom come from the Welch-Satterthwaite formula (GUM G.4.1,
eq. G.2b), and the expanded uncertainty is U = k u_c with k from Student's t at those
degrees of freedom (GUM G.3, table G.2), or a fixed k.

Shapes: n points (the values predicted), c components. Infinite degrees of freedom
mean an exactly known standard uncertainty (a Type B estimate taken at face value).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtri, stdtrit

Array = NDArray[np.float64]

TYPES = ("A", "B")
DISTRIBUTIONS = ("normal", "rectangular", "triangular", "t")
#: the divisor that turns the half-width a of a symmetric distribution into its standard
#: uncertainty u = a / divisor: rectangular sqrt 3 (GUM 4.3.7), triangular sqrt 6 (GUM 4.3.9)
HALF_WIDTH_DIVISORS = {"rectangular": math.sqrt(3.0), "triangular": math.sqrt(6.0)}


def standard_uncertainty(Phi: Array, s2: float, P: Array | None) -> Array:
    """(n,) u in the fitted space for design rows Phi (n, M); NaN when s2 is unknown."""
    n = Phi.shape[0]
    if not np.isfinite(s2):
        return np.full(n, np.nan)
    if P is None:
        return np.full(n, np.sqrt(s2))
    quad = ((Phi @ P) * Phi).sum(axis=1)
    return np.asarray(np.sqrt(s2 * (1.0 + np.maximum(quad, 0.0))))


def _plain(a: Array) -> Any:
    """A 0-d result as a float, an array as itself."""
    return float(a) if a.ndim == 0 else a


# single components ----------------------------------------------------------------------
def rectangular(resolution: ArrayLike) -> Any:
    """Standard uncertainty of a reading quantised to steps of ``resolution`` (same units,
    scalar or array): the error is uniform on +-a with a = resolution / 2, so
    u = a / sqrt(3) = resolution / sqrt(12) (GUM 4.3.7, F.2.2.1)."""
    return _plain(np.asarray(resolution, dtype=float) / math.sqrt(12.0))


def from_expanded(U: ArrayLike, k: float) -> Any:
    """Standard uncertainty from an expanded uncertainty ``U`` stated with coverage factor
    ``k`` (a certificate's U, k): u = U / k, in U's units (GUM 4.3.3)."""
    if not k > 0:
        raise ValueError(f"coverage factor must be positive, got {k!r}")
    return _plain(np.asarray(U, dtype=float) / k)


def from_half_width(a: ArrayLike, distribution: str) -> Any:
    """Standard uncertainty of a quantity known to lie within +-``a`` (the half-width, same
    units) with a ``rectangular`` (u = a / sqrt 3, GUM 4.3.7) or ``triangular``
    (u = a / sqrt 6, GUM 4.3.9) distribution."""
    if distribution not in HALF_WIDTH_DIVISORS:
        raise ValueError(f"distribution must be one of {', '.join(HALF_WIDTH_DIVISORS)}, got {distribution!r}")
    return _plain(np.asarray(a, dtype=float) / HALF_WIDTH_DIVISORS[distribution])


# degrees of freedom and k ---------------------------------------------------------------
def coverage_factor(dof: ArrayLike, coverage: float = 0.95) -> Any:
    """k with P(|t_nu| <= k) = ``coverage`` for Student's t with ``dof`` degrees of freedom
    (scalar or array, same shape back; GUM G.3, table G.2). ``dof`` may be any number
    above 0: it is truncated to the next lower integer, never below 1 (GUM G.4.1 note);
    inf gives the normal quantile; NaN gives NaN."""
    if not 0.0 < coverage < 1.0:
        raise ValueError(f"coverage must lie in (0, 1), got {coverage!r}")
    nu = np.asarray(dof, dtype=float)
    if np.any(nu <= 0.0):
        raise ValueError("degrees of freedom must be above 0")
    q = 0.5 * (1.0 + coverage)  # two-sided: the upper (1 + p) / 2 quantile
    whole = np.maximum(np.floor(nu), 1.0)
    finite = np.isfinite(whole)
    # stdtrit is only evaluated where nu is finite (at inf it is the normal quantile anyway,
    # but ndtri says so directly)
    k = np.where(finite, stdtrit(np.where(finite, whole, 1.0), q), ndtri(q))
    return _plain(np.where(np.isnan(nu), np.nan, k))


def welch_satterthwaite(contributions: ArrayLike, dofs: ArrayLike) -> Array:
    """(n,) effective degrees of freedom of u_c^2 = sum_i u_i^2 (GUM G.4.1, eq. G.2b):

        nu_eff = u_c^4 / sum_i (u_i^4 / nu_i)

    ``contributions`` (c, n): |c_i| u_i in output units; ``dofs`` (c,) or (c, n), each
    above 0, inf allowed. A component with infinite dof or zero contribution adds nothing
    to the denominator; nu_eff is inf when nothing does (all dof infinite, or all
    contributions zero). Not truncated: ``coverage_factor`` does that."""
    u = np.abs(np.atleast_2d(np.asarray(contributions, dtype=float)))
    nu = np.asarray(dofs, dtype=float)
    if nu.ndim == 1:
        nu = nu[:, None]
    if nu.shape[0] != u.shape[0]:
        raise ValueError(f"{u.shape[0]} contributions but {nu.shape[0]} degrees of freedom")
    if np.any(nu <= 0.0):
        raise ValueError("degrees of freedom must be above 0")
    # scaled by the largest contribution per point, so u^4 neither overflows nor underflows
    top = u.max(axis=0)
    r = u / np.where(top > 0.0, top, 1.0)
    r2 = r * r
    den = (r2 * r2 / nu).sum(axis=0)  # 1/inf = 0: an exact component adds nothing
    num = r2.sum(axis=0) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(den > 0.0, num / den, np.inf)
    return np.asarray(np.where(np.isnan(num), np.nan, out))


# the budget -----------------------------------------------------------------------------
@dataclass(frozen=True)
class Component:
    """One source of uncertainty.

    ``u``: standard uncertainty of the input quantity, in its own units, scalar or (n,);
    ``sensitivity``: c_i = dy/dx_i, output units per input unit, scalar or (n,);
    ``dof``: degrees of freedom of u (above 0; inf: taken as exactly known), scalar or (n,).
    ``type`` is how u was evaluated (A: statistics of repeated observations, B: other
    means, GUM 4.2 / 4.3); ``distribution`` the assumed shape behind it.
    """

    source: str
    type: Literal["A", "B"]
    distribution: Literal["normal", "rectangular", "triangular", "t"]
    u: ArrayLike
    sensitivity: ArrayLike = 1.0
    dof: ArrayLike = math.inf

    def __post_init__(self) -> None:
        if self.type not in TYPES:
            raise ValueError(f"{self.source}: type must be one of {TYPES}, got {self.type!r}")
        if self.distribution not in DISTRIBUTIONS:
            raise ValueError(f"{self.source}: distribution must be one of {DISTRIBUTIONS}, "
                             f"got {self.distribution!r}")


def _at(a: Array, i: int) -> float | None:
    """Element i as a JSON number; None for NaN or infinity (JSON has neither)."""
    v = float(a[i])
    return v if math.isfinite(v) else None


@dataclass(frozen=True)
class Budget:
    """A combined uncertainty and its parts, for n points.

    ``u`` (n,): combined standard uncertainty, output units; ``dof`` (n,): effective
    degrees of freedom (inf: every contributing component exact); ``u_in``,
    ``sensitivity``, ``contribution`` (c, n): each component's u, c_i and |c_i| u_i.
    """

    components: tuple[Component, ...]
    u_in: Array
    sensitivity: Array
    contribution: Array
    dofs: Array
    u: Array
    dof: Array

    def expanded(self, coverage: float = 0.95, k: float | None = None) -> tuple[Array, Array]:
        """(U (n,), k (n,)): U = k u in output units; k from Student's t at ``dof`` for
        ``coverage`` unless a fixed ``k`` is given."""
        kk = np.full(self.u.shape, float(k)) if k is not None else np.asarray(coverage_factor(self.dof, coverage))
        return kk * self.u, kk

    def rows_at(self, i: int) -> list[dict[str, Any]]:
        """The budget's rows at point i as JSON-ready dicts: source, type, distribution,
        u (input units), sensitivity, contribution (output units), dof (null: infinite)."""
        return [{"source": c.source, "type": c.type, "distribution": c.distribution,
                 "u": _at(self.u_in[j], i), "sensitivity": _at(self.sensitivity[j], i),
                 "contribution": _at(self.contribution[j], i), "dof": _at(self.dofs[j], i)}
                for j, c in enumerate(self.components)]

    def to_dict(self, i: int) -> dict[str, Any]:
        """Point i as JSON-ready: combined u, effective dof (null: infinite) and the rows."""
        return {"u": _at(self.u, i), "dof": _at(self.dof, i), "rows": self.rows_at(i)}


def budget(components: list[Component] | tuple[Component, ...]) -> Budget:
    """Combine uncorrelated components (GUM eq. 10 and G.2b). Scalars broadcast against
    the (n,) arrays; with scalars only, n = 1."""
    comps = tuple(components)
    if not comps:
        raise ValueError("a budget needs at least one component")
    parts = [(np.asarray(c.u, dtype=float), np.asarray(c.sensitivity, dtype=float),
              np.asarray(c.dof, dtype=float)) for c in comps]
    shape = np.broadcast_shapes(*(p.shape for trio in parts for p in trio))
    if len(shape) > 1:
        raise ValueError(f"component arrays must be scalars or (n,), got shape {shape}")
    n = shape[0] if shape else 1
    u_in, sens, dofs = (np.stack([np.broadcast_to(trio[j], (n,)) for trio in parts]).astype(float)
                        for j in range(3))
    if np.any(u_in < 0.0):
        raise ValueError("standard uncertainties must not be negative")
    contribution = np.abs(sens) * u_in
    # root sum of squares scaled by the largest term, so the squares cannot overflow
    top = contribution.max(axis=0)
    r = contribution / np.where(top > 0.0, top, 1.0)
    u = top * np.sqrt((r * r).sum(axis=0))
    return Budget(comps, u_in, sens, contribution, dofs, u, welch_satterthwaite(contribution, dofs))
