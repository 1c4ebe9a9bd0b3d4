"""Recursive least squares (core/rls.py): exact initialisation against NIST certified
values and numpy, and the bounded covariance under an input that does not move."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper.channel_config import channel_config
from curvekeeper.core.learners import ST_TRMAX
from curvekeeper.core.model import ChannelModel

NIST = Path(__file__).resolve().parent.parent / "data" / "nist"


def rls(inputs: list[dict[str, Any]], basis: dict[str, Any], **learner: Any) -> ChannelModel:
    return ChannelModel.from_config(channel_config({"inputs": inputs, "basis": basis,
                                                    "learner": {"kind": "rls", **learner}}))


def digits(got: np.ndarray, want: np.ndarray) -> float:
    return float(-np.log10(np.max(np.abs(got - want) / np.abs(want))))


@pytest.mark.parametrize("name", ["Norris", "NoInt1"])
def test_forgetting_one_gives_the_certified_least_squares_fit(name: str) -> None:
    """Source: NIST StRD certified estimates. RLS with forgetting 1 at its default (exact)
    initialisation, one sample at a time in file order, ends at the closed-form solution:
    9 significant digits or more (the prior P0 = 1e3 I of the old default gave 1.2 on
    Norris' intercept)."""
    rec = json.loads((NIST / f"{name}.json").read_text(encoding="ascii"))
    x = np.asarray(rec["x"], dtype=np.float64)
    m = rls([{"min": float(x.min()), "max": float(x.max())}],
            {"kind": "poly", "degree": rec["degree"], "intercept": rec["intercept"]}, forgetting=1.0)
    for i in range(len(rec["y"])):
        m.learn(x[i:i + 1], rec["y"][i:i + 1])
    got = np.asarray(m.raw_coefficients()["poly_coefficients"])
    want = np.asarray(rec["certified"]["estimates"], dtype=np.float64)
    if not rec["intercept"]:
        got = got[1:]
    assert digits(got, want) >= 9.0


def test_a_channel_has_no_curve_until_its_first_solution() -> None:
    m = rls([{"min": 0, "max": 10}], {"kind": "poly", "degree": 2})
    m.learn([1.0, 2.0], [1.0, 4.0])
    assert not m.calibrated and m.s.info_b is not None
    res = m.learn([3.0, 4.0], [9.0, 16.0])
    assert m.calibrated and m.s.info_b is None and res.status == ["accepted", "accepted"]
    np.testing.assert_allclose(m.predict([5.0])[0], [25.0], rtol=1e-12)  # x^2 through three points


def test_repeated_input_does_not_count_as_determining_the_curve() -> None:
    """Rows at one input value leave the information matrix singular: still initialising."""
    m = rls([{"min": 0, "max": 10}], {"kind": "poly", "degree": 1})
    m.learn(np.full(50, 3.0), np.full(50, 7.0))
    assert not m.calibrated


@pytest.mark.parametrize("forgetting", [0.99, 0.999])
def test_the_covariance_stays_bounded_under_a_constant_input(forgetting: float) -> None:
    """A cold room at one temperature: 10^6 samples at one x. Without a bound, P / lambda
    grows as lambda^-n in the unexcited direction (0.99: overflow after ~70,000 samples).
    With it: trace(P) <= covariance_bound x its trace after calibration, u at both range
    ends finite and at most 10x its value after calibration, and the channel learns again
    when the input moves."""
    rng = np.random.default_rng(3)
    m = rls([{"min": -20, "max": 40}], {"kind": "poly", "degree": 2}, forgetting=forgetting)
    xc = np.linspace(-20, 40, 12)
    m.fit_closed_form(xc, 1.0 + 0.1 * xc + 0.002 * xc**2 + 0.01 * rng.standard_normal(12))
    ends = np.array([-20.0, 40.0])
    u0 = m.predict(ends)[1]
    bound = m.s.st[ST_TRMAX]
    assert bound == pytest.approx(10.0 * np.trace(m.s.cov))
    n = 1_000_000
    for _ in range(10):
        m.learn(np.full(n // 10, 4.0), 1.432 + 0.01 * rng.standard_normal(n // 10))
        assert np.trace(m.s.cov) <= bound * (1 + 1e-12)
    u = m.predict(ends)[1]
    assert np.isfinite(u).all() and (u <= 10.0 * u0).all()
    # the input moves and the sensor has shifted by 4 noise s.d. (under the outlier gate):
    # the covariance shrinks again and, within 3 memory lengths 1 / (1 - lambda), the curve
    # follows everywhere, the input it sat at included
    truth = 1.04 + 0.1 * ends + 0.002 * ends**2
    n_move = int(3 / (1 - forgetting))
    x = rng.uniform(-20, 40, n_move)
    m.learn(x, 1.04 + 0.1 * x + 0.002 * x**2 + 0.01 * rng.standard_normal(n_move))
    assert np.trace(m.s.cov) < bound / 10
    np.testing.assert_allclose(m.predict(np.r_[ends, 4.0])[0], np.r_[truth, 1.04 + 0.4 + 0.032], atol=0.01)


def test_without_the_bound_the_covariance_winds_up() -> None:
    """The same stream with the bound lifted (a huge covariance_bound): the trace grows far
    past it, so the bounded test above guards a real failure."""
    m = rls([{"min": -20, "max": 40}], {"kind": "poly", "degree": 2}, forgetting=0.99, covariance_bound=1e12)
    xc = np.linspace(-20, 40, 12)
    m.fit_closed_form(xc, 1.0 + 0.1 * xc + 0.01 * np.sin(xc))
    t0 = np.trace(m.s.cov)
    m.learn(np.full(3000, 4.0), np.full(3000, 1.4))
    assert np.trace(m.s.cov) > 1e6 * t0
