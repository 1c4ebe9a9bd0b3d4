"""Nothing poisons a channel: random extreme sequences thrown at every basis, transform and
learner leave a state that is finite, loadable and still learns.

Extreme values: +-1e308 and +-1e-308, 9.9e37 (a common instrument overflow code), +-0,
denormals (5e-324), the declared range's edges and points just beyond the allowed margin.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel, InputError
from hypothesis import given, settings
from hypothesis import strategies as st

LO, HI = 1.0, 50.0
BASES: list[dict[str, Any]] = [
    {"kind": "poly", "degree": 12},
    {"kind": "poly", "degree": 1},
    {"kind": "rbf", "centers": 6},
    {"kind": "log_poly", "powers": [0, 1, 3]},
    {"kind": "hinge", "knots": [10.0, 30.0]},
]
LEARNERS: list[dict[str, Any]] = [
    {"kind": "sgd"},
    {"kind": "sgd", "schedule": {"kind": "constant", "eta0": 5.0}, "l2": 0.1, "huber": 2.0},
    {"kind": "rls"},
    {"kind": "rls", "forgetting": 0.9, "initial_covariance": 1e6},
]
TRANSFORMS: list[dict[str, Any]] = [
    {"transform": "none"},
    {"transform": "reciprocal", "offset": 273.15},
    {"transform": "log", "offset": 1.0},
]
EXTREME = [1e308, -1e308, 1e-308, -1e-308, 9.9e37, -9.9e37, 0.0, -0.0, 5e-324, LO, HI,
           LO - 49.0, HI + 49.0, LO - 49.1 * 1.0, HI + 49.1, 1e15, -1e15]


def reading(draw: st.DrawFn) -> float:
    return draw(st.one_of(st.sampled_from(EXTREME), st.floats(LO, HI), st.floats(-1e300, 1e300)))


@st.composite
def batches(draw: st.DrawFn) -> list[tuple[list[float], list[float]]]:
    out = []
    for _ in range(draw(st.integers(1, 6))):
        n = draw(st.integers(1, 12))
        out.append(([reading(draw) for _ in range(n)], [reading(draw) for _ in range(n)]))
    return out


def finite_state(state: dict[str, Any]) -> bool:
    def walk(v: Any) -> bool:
        if isinstance(v, float):
            return math.isfinite(v)
        if isinstance(v, dict):
            return all(walk(x) for x in v.values())
        if isinstance(v, list):
            return all(walk(x) for x in v)
        return True
    return walk(state)


@settings(max_examples=150, deadline=None)
@given(basis=st.sampled_from(BASES), learner=st.sampled_from(LEARNERS), output=st.sampled_from(TRANSFORMS),
       calibrate=st.booleans(), data=batches())
def test_extreme_sequences_leave_a_finite_loadable_state(basis: dict[str, Any], learner: dict[str, Any],
                                                         output: dict[str, Any], calibrate: bool,
                                                         data: list[tuple[list[float], list[float]]]) -> None:
    config = channel_config({"inputs": [{"min": LO, "max": HI}], "basis": basis, "learner": learner,
                             "output": output})
    m = ChannelModel.from_config(config)
    rng = np.random.default_rng(0)
    good_x = rng.uniform(LO, HI, 40)
    good_y = 20.0 + 0.5 * good_x  # positive: every transform takes it
    if calibrate:
        m.fit_closed_form(good_x, good_y)
    for x, y in data:
        try:
            res = m.learn(x, y)
        except InputError:
            continue  # refused as a whole (y + offset <= 0 for a transform): nothing changed
        for i, status in enumerate(res.status):
            if status == "accepted":
                assert abs(x[i]) <= HI + (HI - LO) * 1.0 + 1e-9  # inside the margin
        state = m.to_state()
        assert finite_state(state)
        m = ChannelModel.from_state(config, json.loads(json.dumps(state, allow_nan=False)))
    assert np.isfinite(m.drift_statistic)
    m.learn(good_x, good_y)  # still learns, still loads
    assert finite_state(m.to_state())


def test_an_overflow_code_is_held_back_and_the_watch_still_works() -> None:
    """One sample at x = 9.9e37 on a degree-12 channel once made the Page-Hinkley and EWMA
    statistics NaN for good (a later 100 s.d. step: drift ok)."""
    for detector in ("page_hinkley", "ewma", "cusum"):
        m = ChannelModel.from_config(channel_config({"inputs": [{"min": LO, "max": HI}],
                                                     "basis": {"kind": "poly", "degree": 12},
                                                     "drift": {"detector": detector}}))
        rng = np.random.default_rng(1)
        x = rng.uniform(LO, HI, 200)
        m.fit_closed_form(x, np.sin(x / 10) + 0.01 * rng.standard_normal(200))
        res = m.learn([9.9e37], [1.0])
        assert res.status == ["out_of_range"]
        assert np.isfinite(m.drift_statistic)
        x = rng.uniform(LO, HI, 50)
        m.learn(x, np.sin(x / 10) + 1.0)  # 100 s.d.
        assert m.in_alarm


def test_a_tiny_reference_on_a_reciprocal_channel_is_not_finite_not_infinity() -> None:
    """y = 1e-200 with offset 0 makes 1 / y = 1e200, and its square overflows: once stored as
    Infinity in the residual variance during the warm-up."""
    m = ChannelModel.from_config(channel_config({"inputs": [{"min": LO, "max": HI}],
                                                 "output": {"transform": "reciprocal"}}))
    res = m.learn([10.0], [1e-200])
    assert res.status == ["not_finite"]
    assert finite_state(m.to_state())


@pytest.mark.parametrize("margin", [0.0, 1.0, 3.0])
def test_inputs_beyond_the_margin_are_held_back_as_out_of_range(margin: float) -> None:
    m = ChannelModel.from_config(channel_config({"inputs": [{"min": 0, "max": 10}], "range_margin": margin}))
    edge = 10.0 + 10.0 * margin
    res = m.learn([edge, edge + 0.01, -10.0 * margin - 0.01], [1.0, 1.0, 1.0])
    assert res.status == ["accepted", "out_of_range", "out_of_range"]
    assert m.n_rejected == 2 and m.n_accepted == 1
