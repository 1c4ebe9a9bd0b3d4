"""Configuration rules: defaults, and a clear, typed error for each broken rule."""

from __future__ import annotations

from typing import Any

import pytest
from curvekeeper.core import ConfigError, normalize_config

BASE: dict[str, Any] = {"inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000}]}


def with_(**over: Any) -> dict[str, Any]:
    return {**BASE, **over}


def test_defaults_are_those_of_the_contract() -> None:
    cfg = normalize_config(BASE)
    assert cfg["basis"] == {"kind": "poly", "degree": 1, "intercept": True}
    assert cfg["learner"] == {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.1, "eps": 1e-6},
                              "l2": 0.0, "huber": None}
    assert cfg["drift"]["detector"] == "page_hinkley" and cfg["drift"]["tolerance"] is None
    assert cfg["outlier_sd"] == 6.0 and cfg["snapshot_every"] == 1000
    assert cfg["coverage_factor"] == 2.0
    assert normalize_config(cfg) == cfg  # idempotent


def test_the_design_example_is_valid() -> None:
    cfg = normalize_config({
        "id": "coldroom2.probe07", "description": "thermistor probe, rack 2",
        "inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000}],
        "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
        "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
        "learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.2}},
        "drift": {"detector": "page_hinkley", "tolerance": 0.3},
        "outlier_sd": 6.0, "snapshot_every": 1000,
    })
    assert cfg["basis"]["powers"] == [0, 1, 3]
    assert cfg["drift"]["tolerance"] == 0.3


@pytest.mark.parametrize(("over", "field", "words"), [
    ({"basis": {"kind": "spline"}}, "basis.kind", "poly, rbf"),
    ({"basis": {"kind": "poly", "degree": -1}}, "basis.degree", "between 0 and 15"),
    ({"basis": {"kind": "poly", "degree": 16}}, "basis.degree", "between 0 and 15"),
    ({"basis": {"kind": "poly", "degree": 0, "intercept": False}}, "basis.degree", "at least 1"),
    ({"learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 2.0}}},
     "learner.schedule.mu", "less than 2"),
    ({"learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0}}},
     "learner.schedule.mu", "greater than 0"),
    ({"learner": {"kind": "rls", "forgetting": 0}}, "learner.forgetting", "greater than 0"),
    ({"learner": {"kind": "rls", "forgetting": 1.01}}, "learner.forgetting", "at most 1"),
    ({"learner": {"kind": "adam"}}, "learner.kind", "sgd or rls"),
    ({"inputs": [{"name": "raw", "min": 5, "max": 5}]}, "inputs[0]", "less than max"),
    ({"inputs": [{"name": "raw", "min": 6, "max": 5}]}, "inputs[0]", "less than max"),
    ({"inputs": [{"name": "raw", "min": 0}]}, "inputs[0]", "min and max"),
    ({"inputs": []}, "inputs", "1 to 8"),
    ({"inputs": [{"name": "raw", "min": float("nan"), "max": 5}]}, "inputs[0].min", "finite"),
    ({"inputs": [{"name": "raw", "min": True, "max": 5}]}, "inputs[0].min", "number"),
    ({"output": {"transform": "sqrt"}}, "output.transform", "none, reciprocal or log"),
    ({"drift": {"detector": "adwin"}}, "drift.detector", "page_hinkley"),
    ({"drift": {"detector": "cusum", "warning": 5, "alarm": 4}}, "drift.alarm", "greater than"),
    ({"drift": {"detector": "cusum", "delta": 1}}, "drift", "unknown field"),
    ({"outlier_sd": -1}, "outlier_sd", "greater than 0"),
    ({"snapshot_every": 0}, "snapshot_every", "between 1"),
    ({"id": "Cold Room!"}, "id", "lower-case"),
    ({"colour": "red"}, "channel", "unknown field"),
    ({"basis": {"kind": "log_poly", "powers": [0, 1, 1]}}, "basis.powers", "repeat"),
    ({"inputs": [{"name": "raw", "min": -1, "max": 5}], "basis": {"kind": "log_poly"}},
     "inputs[0].min", "above zero"),
    ({"basis": {"kind": "hinge", "knots": [500]}}, "basis.knots", "inside the input range"),
    ({"basis": {"kind": "hinge", "knots": [5000, 3000]}}, "basis.knots", "increasing"),
    ({"basis": {"kind": "rbf", "centers": 1}}, "basis.centers", "between 2"),
    ({"inputs": [{"name": f"x{i}", "min": 0, "max": 1} for i in range(8)],
      "basis": {"kind": "poly", "degree": 5}}, "basis.degree", "at most 128"),
])
def test_bad_config_raises_a_typed_error_naming_the_field(over: dict[str, Any], field: str,
                                                          words: str) -> None:
    with pytest.raises(ConfigError) as err:
        normalize_config(with_(**over))
    assert err.value.field == field
    assert words in err.value.message


def test_not_an_object() -> None:
    with pytest.raises(ConfigError):
        normalize_config([1, 2])
