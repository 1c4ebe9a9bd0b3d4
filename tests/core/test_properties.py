"""Properties of ChannelModel checked with hypothesis."""

from __future__ import annotations

import json
import subprocess
import sys
from typing import Any

import numpy as np
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel
from hypothesis import given, settings
from hypothesis import strategies as st


def model_of(body: dict[str, Any]) -> ChannelModel:
    """A fresh model for a channel body, validated as the service validates it."""
    return ChannelModel.from_config(channel_config(body))


learners = st.sampled_from([
    {"kind": "sgd"},
    {"kind": "sgd", "schedule": {"kind": "inverse_time", "eta0": 0.3}},
    {"kind": "rls", "forgetting": 0.995},
])


def stream(seed: int, n: int, lo: float, hi: float) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(lo, hi, n)
    s = (x - lo) / (hi - lo)
    return x, 3.0 + 2.0 * s - 1.5 * s**2 + rng.normal(0, 0.02, n)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1),
       exponent=st.integers(-6, 6),
       learner=learners)
def test_predictions_do_not_depend_on_input_units(seed: int, exponent: int,
                                                  learner: dict[str, Any]) -> None:
    # the same channel in volts and in millivolts (range scaled with the input)
    c = 10.0**exponent
    x, y = stream(seed, 300, 2.0, 9.0)
    models = []
    for scale in (1.0, c):
        m = model_of({"inputs": [{"name": "v", "min": 2.0 * scale, "max": 9.0 * scale}],
                                      "basis": {"kind": "poly", "degree": 2}, "learner": learner})
        m.learn(x * scale, y)
        models.append((m, scale))
    probe = np.linspace(2.0, 9.0, 17)
    (a, _), (b, sb) = models
    ya, ua = a.predict(probe)
    yb, ub = b.predict(probe * sb)
    np.testing.assert_allclose(yb, ya, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(ub, ua, rtol=1e-6, atol=1e-9)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(0, 120), learner=learners,
       detector=st.sampled_from(["page_hinkley", "cusum", "ewma"]))
def test_state_round_trips_through_json(seed: int, n: int, learner: dict[str, Any],
                                        detector: str) -> None:
    x, y = stream(seed, n, 0.0, 1.0)
    m = model_of({"inputs": [{"name": "raw", "min": 0, "max": 1}],
                                  "basis": {"kind": "poly", "degree": 3}, "learner": learner,
                                  "drift": {"detector": detector, "tolerance": 0.1}})
    m.learn(x, y)
    state = m.to_state()
    text = json.dumps(state, allow_nan=False)
    restored = ChannelModel.from_state(m.config, json.loads(text))
    assert restored.to_state() == state
    assert restored.weights.tobytes() == m.weights.tobytes()


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(0, 80), learner=learners)
def test_learning_an_empty_batch_changes_nothing(seed: int, n: int, learner: dict[str, Any]) -> None:
    x, y = stream(seed, n, 0.0, 1.0)
    m = model_of({"inputs": [{"name": "raw", "min": 0, "max": 1}],
                                  "learner": learner})
    m.learn(x, y)
    before = m.to_state()
    result = m.learn([], [])
    assert m.to_state() == before
    assert result.status == [] and result.events == []


def test_the_core_imports_no_web_or_database_library() -> None:
    code = (
        "import sys, curvekeeper.core;"
        "bad = [m for m in ('fastapi', 'pydantic', 'sqlalchemy', 'starlette', 'httpx', 'uvicorn')"
        " if m in sys.modules]; print(bad)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
