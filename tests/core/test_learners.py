"""The SGD (LMS) step of service/curvekeeper/core/learners.py, by hand.

``_sgd_step(w, w_ref, phi, r, s, warm, sk, sp, lp, st, wn)`` is called directly with
parameter vectors built by ``schedule_params`` and the LP_ / ST_ constants. The step
(learners.py docstring, and the LMS rule with a ridge pull toward a reference):

    w <- w + eta * clip(r) * phi - eta * l2 * (w - w_ref),   clip at +-huber * s when warm

Expected values are worked out by hand in each docstring; the numbers are dyadic
(sums of powers of 2), so the float64 result must equal them exactly.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from curvekeeper.core.learners import LP_HUBER, LP_L2, LP_SIZE, ST_SCALE, ST_SIZE, ST_T, _sgd_step
from curvekeeper.core.schedules import schedule_params


def step(
    w: list[float], w_ref: list[float], phi: list[float], r: float, *,
    schedule: dict[str, Any], l2: float = 0.0, huber: float = 0.0, s: float = 1.0,
    warm: bool = True, t: float = 0.0,
) -> tuple[bool, np.ndarray]:
    """One ``_sgd_step`` from a fresh running state (step scale 1); (applied, new w)."""
    sk, sp = schedule_params(schedule)
    lp = np.zeros(LP_SIZE)
    lp[LP_L2] = l2
    lp[LP_HUBER] = huber
    st = np.zeros(ST_SIZE)
    st[ST_SCALE] = 1.0
    st[ST_T] = t
    wa = np.array(w, dtype=float)
    ok = _sgd_step(wa, np.array(w_ref, dtype=float), np.array(phi, dtype=float), r, s, warm,
                   sk, sp, lp, st, np.empty(len(w)))
    return bool(ok), wa


CONSTANT = {"kind": "constant", "eta0": 0.125}


def test_l2_pull_toward_the_reference_weights() -> None:
    """eta = 1/8 (constant), l2 = 1/2, r = 1/4:
    w = (1, -2, 0.5), w_ref = (0.5, -1, 0.5), phi = (1, 0.5, -2)

      eta r phi          = (1/32, 1/64, -1/16)
      eta l2 (w - w_ref) = (1/16) (0.5, -1, 0)  = (1/32, -1/16, 0)
      new w = w + eta r phi - eta l2 (w - w_ref)
            = (1 + 1/32 - 1/32, -2 + 1/64 + 1/16, 0.5 - 1/16)
            = (1, -1.921875, 0.4375)

    A pull of the wrong sign would give (1.0625, -2.046875, 0.4375); no pull
    (l2 = 0) gives (1.03125, -1.984375, 0.4375).
    """
    w, w_ref, phi = [1.0, -2.0, 0.5], [0.5, -1.0, 0.5], [1.0, 0.5, -2.0]
    ok, new = step(w, w_ref, phi, 0.25, schedule=CONSTANT, l2=0.5)
    assert ok
    assert new.tolist() == [1.0, -1.921875, 0.4375]
    # the same as the formula evaluated with numpy
    wv, rv, pv = np.array(w), np.array(w_ref), np.array(phi)
    assert np.array_equal(new, wv + 0.125 * 0.25 * pv - 0.125 * 0.5 * (wv - rv))
    # and without the pull, plain LMS
    ok, plain = step(w, w_ref, phi, 0.25, schedule=CONSTANT, l2=0.0)
    assert ok and plain.tolist() == [1.03125, -1.984375, 0.4375]


def test_l2_pull_alone_shrinks_toward_the_reference() -> None:
    """With r = 0 only the pull acts: w - w_ref shrinks by the factor 1 - eta l2 = 15/16."""
    w, w_ref = [3.0, -1.0], [1.0, 1.0]
    ok, new = step(w, w_ref, [1.0, 1.0], 0.0, schedule=CONSTANT, l2=0.5)
    assert ok
    assert (new - np.array(w_ref)).tolist() == [2.0 * 15 / 16, -2.0 * 15 / 16]


@pytest.mark.parametrize("sign", [1.0, -1.0], ids=["positive", "negative"])
def test_huber_clips_the_residual_when_warm(sign: float) -> None:
    """huber = 2, s = 0.5: the residual is clipped at c = huber * s = 1. r = +-3,
    eta = 1/8, phi = (1, -0.5, 2), w = 0, no pull:

      warm (clipped, r -> +-1):    new w = +-(1/8) (1, -0.5, 2)  = +-(0.125, -0.0625, 0.25)
      not warm (r = +-3 as it is): new w = +-(3/8) (1, -0.5, 2)  = +-(0.375, -0.1875, 0.75)
    A residual inside the clip (r = +-0.75) goes through unchanged in both cases.
    """
    w, phi = [0.0, 0.0, 0.0], [1.0, -0.5, 2.0]
    ok, warm = step(w, w, phi, 3.0 * sign, schedule=CONSTANT, huber=2.0, s=0.5, warm=True)
    assert ok and warm.tolist() == [sign * 0.125, sign * -0.0625, sign * 0.25]
    ok, cold = step(w, w, phi, 3.0 * sign, schedule=CONSTANT, huber=2.0, s=0.5, warm=False)
    assert ok and cold.tolist() == [sign * 0.375, sign * -0.1875, sign * 0.75]
    ok, inside = step(w, w, phi, 0.75 * sign, schedule=CONSTANT, huber=2.0, s=0.5, warm=True)
    assert ok and inside.tolist() == [sign * 0.09375, sign * -0.046875, sign * 0.1875]


def test_huber_off_does_not_clip() -> None:
    """huber = 0 (off): r = 3 goes through even when warm: new w = (3/8) phi."""
    ok, new = step([0.0, 0.0], [0.0, 0.0], [1.0, 2.0], 3.0, schedule=CONSTANT, huber=0.0, s=0.5)
    assert ok and new.tolist() == [0.375, 0.75]


@pytest.mark.parametrize("phi", [[1.0, 1.0, 1.0, 1.0], [0.5, -0.5, 0.5, 0.5], [3.0, 0.0, 4.0, 0.0]])
def test_normalised_schedule_step(phi: list[float]) -> None:
    """Normalised LMS (core/schedules.py): eta = mu / (eps + |phi|^2), so the step takes
    eta |phi|^2 = mu / (1 + eps / |phi|^2) of the sample's own residual away:
    after w <- w + eta r phi (w = 0, r = 1), the residual on the same sample is
    1 - eta |phi|^2. mu = 1/2, eps = 1/4; by hand:

      |phi|^2 = 4:    eta = 0.5 / 4.25 = 2/17,   eta |phi|^2 = 8/17,    residual 9/17
      |phi|^2 = 1:    eta = 0.5 / 1.25 = 2/5,    eta |phi|^2 = 2/5,     residual 3/5
      |phi|^2 = 25:   eta = 0.5 / 25.25 = 2/101, eta |phi|^2 = 50/101,  residual 51/101
    """
    expected_eta = {4.0: 2 / 17, 1.0: 2 / 5, 25.0: 2 / 101}
    nrm2 = float(np.dot(phi, phi))
    eta = expected_eta[nrm2]
    ok, new = step([0.0] * 4, [0.0] * 4, phi, 1.0, schedule={"kind": "normalized", "mu": 0.5, "eps": 0.25},
                   t=1234.0)
    assert ok
    np.testing.assert_allclose(new, eta * np.array(phi), rtol=1e-15, atol=0.0)
    assert 1.0 - float(new @ np.array(phi)) == pytest.approx(1.0 - 0.5 / (1.0 + 0.25 / nrm2), rel=1e-14)
