"""Learning-rate schedules against their closed forms."""

from __future__ import annotations

import math

import pytest
from curvekeeper.core.schedules import eta_at, schedule_params


@pytest.mark.parametrize(("cfg", "t", "nrm2", "expected"), [
    ({"kind": "constant", "eta0": 0.05}, 1234.0, 3.0, 0.05),
    ({"kind": "inverse_time", "eta0": 0.5, "tau": 100.0, "power": 0.6}, 300.0, 1.0, 0.5 / 4**0.6),
    ({"kind": "step", "eta0": 0.1, "gamma": 0.5, "every": 1000}, 2999.0, 1.0, 0.1 * 0.25),
    ({"kind": "step", "eta0": 0.1, "gamma": 0.5, "every": 1000}, 3000.0, 1.0, 0.1 * 0.125),
    ({"kind": "normalized", "mu": 0.2, "eps": 1e-6}, 0.0, 4.0, 0.2 / (1e-6 + 4.0)),
])
def test_eta(cfg: dict[str, object], t: float, nrm2: float, expected: float) -> None:
    kind, sp = schedule_params(cfg)
    assert eta_at(kind, sp, t, nrm2) == pytest.approx(expected, rel=1e-15)


def test_normalized_step_shrinks_the_residual_by_one_minus_mu() -> None:
    # NLMS: after w += eta r phi, the residual on the same sample is (1 - eta |phi|^2) r
    kind, sp = schedule_params({"kind": "normalized", "mu": 0.3, "eps": 0.0})
    for nrm2 in (1e-6, 1.0, 1e6):
        assert 1 - eta_at(kind, sp, 0.0, nrm2) * nrm2 == pytest.approx(0.7, rel=1e-12)
    assert not math.isnan(eta_at(kind, sp, 0.0, 1.0))
