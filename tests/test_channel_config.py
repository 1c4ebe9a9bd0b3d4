"""The channel configuration's declaration (``curvekeeper.channel_config``): defaults, and
for each rule a ``ValidationError`` located at the field at fault, saying why."""

from __future__ import annotations

from typing import Any

import pytest
from curvekeeper.actions.channels import merge, validated
from curvekeeper.channel_config import EXAMPLE, ChannelConfig, NewChannel, channel_config, warnings_for
from curvekeeper.core.drift import DETECTOR_DEFAULTS
from pydantic import ValidationError

BASE: dict[str, Any] = {"inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000}]}
ONE = {"min": 0, "max": 1}


def with_(**over: Any) -> dict[str, Any]:
    return {**BASE, **over}


def test_defaults_are_those_of_the_contract() -> None:
    cfg = channel_config(BASE)
    assert cfg["description"] == ""
    assert cfg["output"] == {"name": "value", "unit": "", "transform": "none", "offset": 0.0}
    assert cfg["basis"] == {"kind": "poly", "degree": 1, "intercept": True}
    assert cfg["learner"] == {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.1, "eps": 1e-6},
                              "l2": 0.0, "huber": None}
    assert cfg["drift"] == {"detector": "page_hinkley", "tolerance": None, **DETECTOR_DEFAULTS["page_hinkley"]}
    assert cfg["outlier_sd"] == 6.0 and cfg["snapshot_every"] == 1000
    assert cfg["coverage"] == 0.95 and cfg["coverage_factor"] is None  # null: k from Student's t
    assert cfg["reference"] is None and cfg["range_margin"] == 1.0
    assert cfg["inputs"][0]["resolution"] is None
    assert channel_config(cfg) == cfg  # idempotent
    assert "id" not in cfg and channel_config({"id": "a.b", **BASE})["id"] == "a.b"


@pytest.mark.parametrize(("section", "body", "expected"), [
    ("learner", {"kind": "rls"}, {"kind": "rls", "forgetting": 0.999, "initial_covariance": None,
                                  "covariance_bound": 10.0}),
    ("learner", {"schedule": {"kind": "constant"}}, {"kind": "sgd", "schedule": {"kind": "constant", "eta0": 0.05},
                                                     "l2": 0.0, "huber": None}),
    ("learner", {"schedule": {"kind": "inverse_time"}},
     {"kind": "sgd", "schedule": {"kind": "inverse_time", "eta0": 0.5, "tau": 100.0, "power": 0.6}, "l2": 0.0,
      "huber": None}),
    ("learner", {"schedule": {"kind": "step"}},
     {"kind": "sgd", "schedule": {"kind": "step", "eta0": 0.1, "gamma": 0.5, "every": 1000}, "l2": 0.0,
      "huber": None}),
    ("drift", {"detector": "cusum"}, {"detector": "cusum", "tolerance": None, **DETECTOR_DEFAULTS["cusum"]}),
    ("drift", {"detector": "ewma"}, {"detector": "ewma", "tolerance": None, **DETECTOR_DEFAULTS["ewma"]}),
    ("basis", {"kind": "log_poly"}, {"kind": "log_poly", "powers": [0, 1, 3]}),
    ("basis", {"kind": "rbf", "centers": 3}, {"kind": "rbf", "centers": [[1000.0], [20500.0], [40000.0]],
                                              "width": 1.0, "intercept": True}),
    ("basis", {"kind": "rbf"}, {"kind": "rbf", "centers": [[1000 + 39000 * i / 7] for i in range(8)],
                                "width": 2 / 7, "intercept": True}),
    ("basis", {"kind": "rbf", "centers": [1500, 2000], "width": 0.5},
     {"kind": "rbf", "centers": [[1500.0], [2000.0]], "width": 0.5, "intercept": True}),
    ("basis", {"kind": "hinge", "knots": [5000, 20000]}, {"kind": "hinge", "knots": [5000.0, 20000.0],
                                                          "intercept": True}),
])
def test_each_kind_gets_its_defaults(section: str, body: dict[str, Any], expected: dict[str, Any]) -> None:
    assert channel_config(with_(**{section: body}))[section] == expected


def test_null_means_the_default_where_it_cannot_mean_off() -> None:
    cfg = channel_config(with_(description=None, output=None, basis=None, learner=None, drift=None,
                               outlier_sd=None, snapshot_every=None))
    assert cfg["description"] == "" and cfg["basis"]["kind"] == "poly" and cfg["drift"]["detector"] == "page_hinkley"
    assert cfg["outlier_sd"] is None and cfg["snapshot_every"] is None  # null: the gate and snapshots off


def test_inputs_are_named_by_position_by_default_and_integral_numbers_are_integers() -> None:
    cfg = channel_config(with_(inputs=[ONE, {**ONE, "name": "t"}], snapshot_every=50.0,
                               basis={"kind": "poly", "degree": 2.0}))
    assert [i["name"] for i in cfg["inputs"]] == ["x0", "t"]
    assert cfg["snapshot_every"] == 50 and isinstance(cfg["snapshot_every"], int)
    assert cfg["basis"]["degree"] == 2


def test_the_documented_example_is_valid() -> None:
    cfg = channel_config(EXAMPLE)
    assert cfg["basis"]["powers"] == [0, 1, 3]
    assert cfg["drift"]["tolerance"] == 0.3
    assert cfg["learner"]["schedule"] == {"kind": "normalized", "mu": 0.2, "eps": 1e-6}
    assert cfg["inputs"][0]["resolution"] == 0.1
    assert cfg["reference"] == {"expanded_uncertainty": 0.02, "coverage_factor": 2.0, "distribution": "normal",
                                "instrument": None}


BAD = [
    # (body changes, loc of the field at fault, words of the reason)
    ({"basis": {"kind": "spline"}}, ("basis", "kind"), "poly, rbf, log_poly, hinge"),
    ({"basis": {"kind": "poly", "degree": -1}}, ("basis", "degree"), "greater than or equal to 0"),
    ({"basis": {"kind": "poly", "degree": 16}}, ("basis", "degree"), "less than or equal to 15"),
    ({"basis": {"kind": "poly", "degree": 0, "intercept": False}}, ("basis", "degree"), "at least 1"),
    ({"basis": {"kind": "poly", "intercept": "no"}}, ("basis", "intercept"), "valid boolean"),
    ({"basis": {"kind": "poly", "degree": 1, "knots": [1]}}, ("basis", "knots"), "Extra inputs"),
    ({"inputs": [ONE] * 8, "basis": {"kind": "poly", "degree": 5}}, ("basis", "degree"), "at most 128"),
    ({"inputs": [ONE] * 2, "basis": {"kind": "poly", "degree": 2, "intercept": False}},
     ("basis", "intercept"), "single input"),
    ({"basis": {"kind": "rbf", "centers": 1}}, ("basis", "centers"), "greater than or equal to 2"),
    ({"basis": {"kind": "rbf", "centers": 65}}, ("basis", "centers"), "less than or equal to 64"),
    ({"basis": {"kind": "rbf", "centers": "many"}}, ("basis", "centers"), "a count (2 to 64) or a list"),
    ({"basis": {"kind": "rbf", "centers": []}}, ("basis", "centers"), "at least 1 item"),
    ({"inputs": [ONE] * 2, "basis": {"kind": "rbf", "centers": 4}}, ("basis", "centers"), "list the centre points"),
    ({"inputs": [ONE] * 2, "basis": {"kind": "rbf", "centers": [[0, 0], [1]]}}, ("basis", "centers", 1),
     "2 coordinate(s)"),
    ({"basis": {"kind": "rbf", "width": 0}}, ("basis", "width"), "greater than 0"),
    ({"basis": {"kind": "rbf", "width": 101}}, ("basis", "width"), "less than or equal to 100"),
    ({"basis": {"kind": "log_poly", "powers": [0, 1, 1]}}, ("basis", "powers"), "repeat"),
    ({"basis": {"kind": "log_poly", "powers": [8]}}, ("basis", "powers", 0), "less than or equal to 7"),
    ({"basis": {"kind": "log_poly", "powers": []}}, ("basis", "powers"), "at least 1 item"),
    ({"inputs": [{"name": "raw", "min": -1, "max": 5}], "basis": {"kind": "log_poly"}},
     ("inputs", 0, "min"), "above zero"),
    ({"inputs": [{"min": 1, "max": 2}] * 2, "basis": {"kind": "log_poly"}}, ("basis", "kind"), "single input"),
    ({"basis": {"kind": "hinge"}}, ("basis", "knots"), "Field required"),
    ({"basis": {"kind": "hinge", "knots": [500]}}, ("basis", "knots"), "inside the input range"),
    ({"basis": {"kind": "hinge", "knots": [5000, 40000]}}, ("basis", "knots"), "inside the input range"),
    ({"basis": {"kind": "hinge", "knots": [5000, 3000]}}, ("basis", "knots"), "increasing"),
    ({"inputs": [ONE] * 2, "basis": {"kind": "hinge", "knots": [0.5]}}, ("basis", "kind"), "single input"),
    ({"learner": {"kind": "adam"}}, ("learner", "kind"), "sgd, rls"),
    ({"learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 2.0}}},
     ("learner", "schedule", "mu"), "less than 2"),
    ({"learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0}}},
     ("learner", "schedule", "mu"), "greater than 0"),
    ({"learner": {"schedule": {"kind": "cosine"}}}, ("learner", "schedule", "kind"), "constant, inverse_time"),
    ({"learner": {"schedule": {"kind": "step", "every": 0}}}, ("learner", "schedule", "every"), "greater than"),
    ({"learner": {"schedule": {"kind": "step", "gamma": 1.5}}}, ("learner", "schedule", "gamma"), "less than"),
    ({"learner": {"schedule": {"kind": "inverse_time", "power": 3}}}, ("learner", "schedule", "power"), "less"),
    ({"learner": {"schedule": {"kind": "constant", "eta0": 0}}}, ("learner", "schedule", "eta0"), "greater"),
    ({"learner": {"schedule": {"kind": "constant", "tau": 1}}}, ("learner", "schedule", "tau"), "Extra inputs"),
    ({"learner": {"l2": -1}}, ("learner", "l2"), "greater than or equal to 0"),
    ({"learner": {"huber": 0}}, ("learner", "huber"), "greater than 0"),
    ({"learner": {"kind": "rls", "forgetting": 0}}, ("learner", "forgetting"), "greater than 0"),
    ({"learner": {"kind": "rls", "forgetting": 1.01}}, ("learner", "forgetting"), "less than or equal to 1"),
    ({"learner": {"kind": "rls", "initial_covariance": 0}}, ("learner", "initial_covariance"), "greater than 0"),
    ({"learner": {"kind": "rls", "initial_covariance": 1e13}}, ("learner", "initial_covariance"), "less than or"),
    ({"learner": {"kind": "rls", "covariance_bound": 0.5}}, ("learner", "covariance_bound"),
     "greater than or equal to 1"),
    ({"learner": {"kind": "rls", "covariance_bound": 1e13}}, ("learner", "covariance_bound"), "less than or"),
    ({"learner": {"kind": "rls", "covariance_bound": "10"}}, ("learner", "covariance_bound"), "valid number"),
    ({"learner": {"kind": "sgd", "covariance_bound": 10}}, ("learner", "covariance_bound"), "Extra inputs"),
    ({"learner": {"kind": "rls", "forgetting": 0.9, "initial_covariance": -1}}, ("learner", "initial_covariance"),
     "greater than 0"),
    ({"learner": {"kind": "rls", "l2": 0.1}}, ("learner", "l2"), "Extra inputs"),
    ({"inputs": [{"name": "raw", "min": 5, "max": 5}]}, ("inputs", 0), "less than max"),
    ({"inputs": [{"name": "raw", "min": 6, "max": 5}]}, ("inputs", 0), "less than max"),
    # a span so small that scaling by it overflows (found by the fuzz test: a 500 before)
    ({"inputs": [{"name": "raw", "min": 0.0, "max": 5e-324}]}, ("inputs", 0, "max"), "too small to scale"),
    ({"inputs": [{"name": "raw", "min": 0}]}, ("inputs", 0, "max"), "Field required"),
    ({"inputs": [{"name": "raw", "min": 0, "max": 1, "offset": 2}]}, ("inputs", 0, "offset"), "Extra inputs"),
    ({"inputs": []}, ("inputs",), "at least 1 item"),
    ({"inputs": [ONE] * 9}, ("inputs",), "at most 8 items"),
    ({"inputs": [ONE, {"name": "x0", **ONE}]}, ("inputs", 1, "name"), "used twice"),
    ({"inputs": [{"name": "raw", "min": float("nan"), "max": 5}]}, ("inputs", 0, "min"), "finite"),
    ({"inputs": [{"name": "raw", "min": -1e301, "max": 5}]}, ("inputs", 0, "min"), "greater than or equal"),
    ({"inputs": [{"name": "raw", "min": True, "max": 5}]}, ("inputs", 0, "min"), "valid number"),
    ({"inputs": [{"name": "raw", "min": "0", "max": 5}]}, ("inputs", 0, "min"), "valid number"),
    ({"inputs": [{"name": "r" * 257, "min": 0, "max": 5}]}, ("inputs", 0, "name"), "at most 256"),
    ({"output": {"transform": "sqrt"}}, ("output", "transform"), "'none', 'reciprocal' or 'log'"),
    ({"output": {"offset": float("inf")}}, ("output", "offset"), "finite"),
    ({"drift": {"detector": "adwin"}}, ("drift", "detector"), "page_hinkley, cusum, ewma"),
    ({"drift": {"detector": "cusum", "warning": 5, "alarm": 4}}, ("drift", "alarm"), "greater than drift.warning"),
    ({"drift": {"warning": 12}}, ("drift", "alarm"), "greater than drift.warning"),
    ({"drift": {"detector": "cusum", "delta": 1}}, ("drift", "delta"), "Extra inputs"),
    ({"drift": {"detector": "ewma", "lambda": 0}}, ("drift", "lambda"), "greater than 0"),
    ({"drift": {"detector": "ewma", "lambda_": 0.1}}, ("drift", "lambda_"), "Extra inputs"),
    ({"drift": {"mean_window": 9}}, ("drift", "mean_window"), "greater than or equal to 10"),
    ({"drift": {"clip": -1}}, ("drift", "clip"), "greater than or equal to 0"),
    ({"drift": {"tolerance": 0}}, ("drift", "tolerance"), "greater than 0"),
    ({"outlier_sd": -1}, ("outlier_sd",), "greater than 0"),
    ({"outlier_sd": True}, ("outlier_sd",), "valid number"),
    ({"snapshot_every": 0}, ("snapshot_every",), "greater than or equal to 1"),
    ({"snapshot_every": 2.5}, ("snapshot_every",), "valid integer"),
    ({"snapshot_every": True}, ("snapshot_every",), "valid integer"),
    ({"coverage_factor": 0}, ("coverage_factor",), "greater than 0"),
    ({"coverage_factor": 10.5}, ("coverage_factor",), "less than or equal to 10"),
    ({"coverage": 0.4}, ("coverage",), "greater than or equal to 0.5"),
    ({"coverage": 1.0}, ("coverage",), "less than or equal to 0.9999"),
    ({"coverage": True}, ("coverage",), "valid number"),
    ({"coverage": None}, ("coverage",), "valid number"),
    ({"inputs": [{"name": "raw", "min": 0, "max": 5, "resolution": 0}]}, ("inputs", 0, "resolution"),
     "greater than 0"),
    ({"inputs": [{"name": "raw", "min": 0, "max": 5, "resolution": -0.1}]}, ("inputs", 0, "resolution"),
     "greater than 0"),
    ({"inputs": [{"name": "raw", "min": 0, "max": 5, "resolution": "1"}]}, ("inputs", 0, "resolution"),
     "valid number"),
    ({"reference": {"coverage_factor": 2}}, ("reference", "expanded_uncertainty"), "Field required"),
    ({"reference": {"expanded_uncertainty": -0.1}}, ("reference", "expanded_uncertainty"),
     "greater than or equal to 0"),
    ({"reference": {"expanded_uncertainty": float("inf")}}, ("reference", "expanded_uncertainty"), "finite"),
    ({"reference": {"expanded_uncertainty": 0.1, "coverage_factor": 0}}, ("reference", "coverage_factor"),
     "greater than 0"),
    ({"reference": {"expanded_uncertainty": 0.1, "coverage_factor": 11}}, ("reference", "coverage_factor"),
     "less than or equal to 10"),
    ({"reference": {"expanded_uncertainty": 0.1, "k": 2}}, ("reference", "k"), "Extra inputs"),
    ({"reference": 0.1}, ("reference",), "valid dictionary"),
    ({"range_margin": -0.1}, ("range_margin",), "greater than or equal to 0"),
    ({"range_margin": 2e6}, ("range_margin",), "less than or equal to 1000000"),
    ({"range_margin": None}, ("range_margin",), "valid number"),
    ({"description": 7}, ("description",), "valid string"),
    ({"id": "Cold Room!"}, ("id",), "pattern"),
    ({"colour": "red"}, ("colour",), "Extra inputs"),
]


@pytest.mark.parametrize(("over", "loc", "words"), BAD)
def test_a_broken_rule_names_the_field_and_says_why(over: dict[str, Any], loc: tuple[Any, ...], words: str) -> None:
    with pytest.raises(ValidationError) as err:
        channel_config(with_(**over))
    first = err.value.errors()[0]
    assert first["loc"] == loc
    assert words in first["msg"]


def test_the_uncertainty_settings_take_their_values() -> None:
    """What a body states is kept: the bounds themselves are inside the ranges, and null
    keeps its meaning (k from Student's t, exact RLS initialisation, no reference)."""
    cfg = channel_config(with_(
        inputs=[{"name": "raw", "min": 0, "max": 5, "resolution": 0.01}], coverage=0.9999, coverage_factor=10,
        reference={"expanded_uncertainty": 0.05}, range_margin=0,
        learner={"kind": "rls", "initial_covariance": 1e3, "covariance_bound": 1}))
    assert cfg["inputs"][0]["resolution"] == 0.01
    assert cfg["coverage"] == 0.9999 and cfg["coverage_factor"] == 10.0
    assert cfg["reference"] == {"expanded_uncertainty": 0.05, "coverage_factor": 2.0, "distribution": "normal",
                                "instrument": None}
    assert cfg["range_margin"] == 0.0
    assert cfg["learner"] == {"kind": "rls", "forgetting": 0.999, "initial_covariance": 1e3,
                              "covariance_bound": 1.0}
    low = channel_config(with_(coverage=0.5, reference={"expanded_uncertainty": 0, "coverage_factor": 3}))
    assert low["coverage"] == 0.5 and low["reference"] == {"expanded_uncertainty": 0.0, "coverage_factor": 3.0,
                                                           "distribution": "normal", "instrument": None}
    nulls = channel_config(with_(coverage_factor=None, reference=None,
                                 inputs=[{"name": "raw", "min": 0, "max": 5, "resolution": None}],
                                 learner={"kind": "rls", "initial_covariance": None}))
    assert nulls["coverage_factor"] is None and nulls["reference"] is None
    assert nulls["inputs"][0]["resolution"] is None and nulls["learner"]["initial_covariance"] is None


def test_a_stored_channel_keeps_its_coverage_factor() -> None:
    """A channel stored before k became optional has ``coverage_factor: 2.0`` and an rls
    prior in its stored body: validating that body again keeps both."""
    old = channel_config(with_(coverage_factor=2.0, learner={"kind": "rls", "initial_covariance": 1e3}))
    again = channel_config(old)
    assert again["coverage_factor"] == 2.0 and again["learner"]["initial_covariance"] == 1e3
    assert again == old


def test_not_an_object() -> None:
    with pytest.raises(ValidationError):
        channel_config([1, 2])


def test_the_schema_describes_each_kind() -> None:
    """The declaration is what /openapi.json shows: one schema per kind, told apart by its tag."""
    schema = ChannelConfig.model_json_schema()
    props = schema["properties"]
    assert props["basis"]["discriminator"]["propertyName"] == "kind"
    assert set(props["basis"]["discriminator"]["mapping"]) == {"poly", "rbf", "log_poly", "hinge"}
    assert set(props["learner"]["discriminator"]["mapping"]) == {"sgd", "rls"}
    assert set(props["drift"]["discriminator"]["mapping"]) == set(DETECTOR_DEFAULTS)
    sgd = schema["$defs"]["SgdLearner"]["properties"]["schedule"]
    assert set(sgd["discriminator"]["mapping"]) == {"constant", "inverse_time", "step", "normalized"}
    assert set(schema["required"]) == {"id", "inputs"}


# units: a new channel states them; a channel stored without them keeps working -------------

NEW: dict[str, Any] = {"id": "site-a.p1", "inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000}],
                       "output": {"name": "temperature", "unit": "degC"}}


@pytest.mark.parametrize(("body", "loc", "kind"), [
    ({**NEW, "inputs": [{"name": "raw", "min": 1000, "max": 40000}]}, ("inputs", 0, "unit"), "missing"),
    ({**NEW, "inputs": [{"name": "raw", "unit": "", "min": 1000, "max": 40000}]}, ("inputs", 0, "unit"),
     "value_error"),
    ({**NEW, "inputs": [NEW["inputs"][0], {"name": "tc", "unit": "  ", **ONE}]}, ("inputs", 1, "unit"),
     "value_error"),
    ({**NEW, "inputs": [{"name": "raw", "unit": None, "min": 1000, "max": 40000}]}, ("inputs", 0, "unit"),
     "string_type"),
    ({**NEW, "output": {"name": "temperature"}}, ("output", "unit"), "missing"),
    ({**NEW, "output": {"name": "temperature", "unit": " "}}, ("output", "unit"), "value_error"),
    ({k: v for k, v in NEW.items() if k != "output"}, ("output",), "missing"),
])
def test_a_new_channel_must_state_its_units(body: dict[str, Any], loc: tuple[Any, ...], kind: str) -> None:
    with pytest.raises(ValidationError) as exc:
        NewChannel.model_validate(body)
    (first,) = exc.value.errors()
    assert (first["loc"], first["type"]) == (loc, kind), first
    assert NewChannel.model_validate(NEW).model_dump(mode="json") == channel_config(NEW)


def test_a_channel_stored_without_units_still_validates_through_the_patch_path() -> None:
    """Channels created before units were required have empty units: a PATCH merges its
    changes into the stored config and re-validates that with ChannelConfig, not NewChannel."""
    stored = channel_config({"id": "site-a.old", "inputs": [{"name": "raw", "min": 0, "max": 100}]})
    assert stored["inputs"][0]["unit"] == "" and stored["output"]["unit"] == ""
    config = validated(merge(stored, {"drift": {"tolerance": 0.5}}))
    assert config == {**stored, "drift": {**stored["drift"], "tolerance": 0.5}}


@pytest.mark.parametrize(("basis", "warned"), [
    ({"kind": "poly", "degree": 8}, True), ({"kind": "poly", "degree": 15}, True),
    ({"kind": "poly", "degree": 7}, False), ({"kind": "poly", "degree": 3}, False),
    ({"kind": "hinge", "knots": [2000, 10000]}, False),
])
def test_a_polynomial_degree_above_7_is_taken_with_a_warning(basis: dict[str, Any], warned: bool) -> None:
    """Common practice: a polynomial of high degree fitted to points swings between them
    (Runge's phenomenon); degree 7 is where the warning starts."""
    said = warnings_for(channel_config({**NEW, "basis": basis}))
    assert said == ([f"basis.degree is {basis['degree']}: a polynomial of degree above 7 swings between the "
                     f"points it is fitted to (Runge's phenomenon); prefer degree 7 or less, or a hinge or rbf "
                     f"basis"] if warned else [])
