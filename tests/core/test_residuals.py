"""Running residual statistics (core/residuals.py) against scipy."""

from __future__ import annotations

import numpy as np
import pytest
from curvekeeper.core.residuals import reference_sd, scale_margin
from scipy.stats import chi2, norm


@pytest.mark.parametrize("dof", [3, 5, 10, 30, 100, 530])
def test_scale_margin_is_the_chi_square_upper_bound(dof: int) -> None:
    """sqrt(nu / chi2_q(nu)) with q = 10 %: an estimate s on nu degrees of freedom times this
    bounds the true s.d. from above with 90 % confidence. The Wilson-Hilferty approximation
    against scipy's chi-square quantile: within 1 % from 3 degrees of freedom on."""
    want = np.sqrt(dof / chi2.ppf(0.10, dof))
    assert scale_margin(float(dof), float(norm.ppf(0.10))) == pytest.approx(want, rel=0.01)


def test_scale_margin_covers_by_simulation() -> None:
    """Seeded: for 5-point straight-line fits (3 degrees of freedom), s x margin exceeds the
    true s.d. in 90 % of 20,000 draws (s.e. 0.2 %)."""
    rng = np.random.default_rng(5)
    s = np.sqrt(chi2.rvs(3, size=20_000, random_state=rng) / 3)
    assert np.mean(s * scale_margin(3.0, float(norm.ppf(0.10))) >= 1.0) == pytest.approx(0.90, abs=0.01)


def test_reference_sd_pools_the_fit_with_the_samples_variance_about_their_mean() -> None:
    """(nu s_fit^2 + n v) / (nu + n - 1), v the population variance of the n residuals (numpy's
    var with ddof 0): the pooled unbiased variance of two independent groups."""
    rng = np.random.default_rng(6)
    e = rng.normal(0.3, 2.0, 40)
    s, dof = reference_sd(1.5, 7.0, float(np.var(e)), 40.0, 500.0)
    want = (7.0 * 1.5 + np.sum((e - e.mean()) ** 2)) / (7.0 + 39.0)
    assert (s**2, dof) == (pytest.approx(want, rel=1e-12), 46.0)
