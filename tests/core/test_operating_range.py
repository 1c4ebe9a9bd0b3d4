"""The operating range: where curves are compared (tolerance check, a calibration's change,
snapshot differences) and where the residual s.d. is put into output units. Figures are
checked against numpy evaluating the curves directly on a fine grid."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel
from numpy.polynomial import chebyshev

FINE = 100_001  # points of numpy's own grid


def model_of(body: dict[str, Any]) -> ChannelModel:
    return ChannelModel.from_config(channel_config(body))


def hinge(tolerance: float | None = None, operating_range: list[float] | None = None) -> dict[str, Any]:
    """y = w0 + w1 s + w2 max(0, s - 0) on s = x / 50 - 1: w2 moves the curve above x = 50 only."""
    return {"inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0, "operating_range": operating_range}],
            "output": {"name": "temperature", "unit": "degC"}, "basis": {"kind": "hinge", "knots": [50.0]},
            "drift": {"tolerance": tolerance}}


def calibrated_hinge(**settings: Any) -> ChannelModel:
    """Calibrated on the straight line y = 1 + 2 s from x = 0 to 100."""
    m = model_of(hinge(**settings))
    x = np.linspace(0.0, 100.0, 11)
    m.fit_closed_form(x, 1.0 + 2.0 * (x / 50.0 - 1.0))
    np.testing.assert_allclose(m.weights, [1.0, 2.0, 0.0], atol=1e-12)
    return m


def retolerance(m: ChannelModel, tolerance: float, operating_range: list[float] | None = None) -> ChannelModel:
    """The model under a new tolerance (and operating range): the check runs again."""
    return m.with_settings(channel_config(hinge(tolerance, operating_range)))


def test_a_curve_that_moved_only_outside_the_operating_range_is_within_tolerance() -> None:
    m = calibrated_hinge(tolerance=1.0, operating_range=[10.0, 40.0])
    assert m.operating_ranges() == [{"name": "raw", "min": 10.0, "max": 40.0, "source": "declared"}]
    m.s.w = np.array([1.0, 2.0, 5.0])  # +5 max(0, s): 0 up to x = 50, 5 at x = 100
    checked = retolerance(m, 0.5, [10.0, 40.0])
    assert checked.tolerance_state == "ok" and checked.max_curve_change == pytest.approx(0.0, abs=1e-12)
    # over the span of the calibration points (0 to 100) the same curve is 5 degC off at x = 100
    whole = retolerance(m, 0.5)
    assert whole.operating_ranges() == [{"name": "raw", "min": 0.0, "max": 100.0, "source": "calibration"}]
    assert whole.tolerance_state == "out_of_tolerance"
    assert whole.max_curve_change == pytest.approx(5.0, rel=1e-12)


def test_a_curve_that_moved_inside_the_operating_range_is_out_of_tolerance() -> None:
    m = calibrated_hinge(tolerance=1.0, operating_range=[10.0, 40.0])
    m.s.w = np.array([1.0, 2.02, 0.0])
    checked = retolerance(m, 0.01, [10.0, 40.0])
    x = np.linspace(10.0, 40.0, FINE)  # numpy: |0.02 s| over the operating range
    expected = float(np.max(np.abs(0.02 * (x / 50.0 - 1.0))))
    assert checked.tolerance_state == "out_of_tolerance"
    assert checked.max_curve_change == pytest.approx(expected, rel=1e-9)  # 0.016 at x = 10


def test_the_largest_difference_matches_numpy_on_a_fine_grid() -> None:
    """A cubic in Chebyshev form on [-50, 150], compared over the declared [0, 40]: numpy's
    chebval on 100,001 points gives the largest difference; the service's 201-point grid
    finds it to a part in 10^4 and never above it."""
    m = model_of({"inputs": [{"name": "raw", "unit": "mV", "min": -50.0, "max": 150.0, "operating_range": [0, 40]}],
                  "output": {"name": "t", "unit": "degC"}, "basis": {"kind": "poly", "degree": 3}})
    rng = np.random.default_rng(7)
    w_ref, w_now = rng.normal(size=4), rng.normal(size=4)
    m.s.w = w_now.copy()
    probe = np.array([-50.0, 0.0, 17.0, 150.0])
    np.testing.assert_allclose(m.curve_values(w_now)[[0, -1]],
                               chebyshev.chebval((np.array([0.0, 40.0]) - 50.0) / 100.0, w_now), rtol=1e-12)
    y, _ = m.predict(probe)  # the basis is numpy's Chebyshev series in s = (x - 50) / 100
    np.testing.assert_allclose(y, chebyshev.chebval((probe - 50.0) / 100.0, w_now), rtol=1e-12)
    s = (np.linspace(0.0, 40.0, FINE) - 50.0) / 100.0
    expected = float(np.max(np.abs(chebyshev.chebval(s, w_now) - chebyshev.chebval(s, w_ref))))
    largest, at, left_out = m.curve_difference(w_ref)
    assert largest is not None and at is not None and left_out == 0
    assert expected * (1 - 1e-4) <= largest <= expected + 1e-12
    assert 0.0 <= at[0] <= 40.0
    assert m.max_curve_difference(w_ref) == largest


def test_the_span_of_the_samples_grows_and_stays_inside_the_range() -> None:
    m = model_of({"inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
                  "output": {"name": "t", "unit": "degC"}, "range_margin": 0.5})
    assert m.operating_ranges()[0]["source"] == "input_range"  # nothing known yet
    m.fit_closed_form([0.0, 50.0, 100.0], [0.0, 50.0, 100.0])  # a bench calibration over the whole range
    assert m.operating_ranges()[0] == {"name": "raw", "min": 0.0, "max": 100.0, "source": "calibration"}
    m.learn([20.0, 30.0, 25.0], [20.0, 30.0, 25.0])  # in service: where the samples are
    assert m.operating_ranges()[0] == {"name": "raw", "min": 20.0, "max": 30.0, "source": "samples"}
    m.learn([1000.0], [1000.0])  # beyond the margin: held as out of range, not counted
    assert (m.operating_ranges()[0]["min"], m.operating_ranges()[0]["max"]) == (20.0, 30.0)
    m.learn([120.0], [120.0])  # within the margin: learned, counted up to max
    assert (m.operating_ranges()[0]["min"], m.operating_ranges()[0]["max"]) == (20.0, 100.0)
    m.set_service("out_of_service")
    m.learn([5.0], [5.0])  # out of service: still where the sensor is used
    assert m.operating_ranges()[0]["min"] == 5.0
    m.fit_closed_form([40.0, 50.0, 60.0], [40.0, 50.0, 60.0])  # a later calibration: the samples' span stays
    assert m.operating_ranges()[0] == {"name": "raw", "min": 5.0, "max": 100.0, "source": "samples"}


def test_the_span_is_kept_in_the_state_and_an_older_state_compares_over_the_whole_range() -> None:
    m = model_of(hinge(1.0))
    m.fit_closed_form([10.0, 20.0, 40.0, 60.0], [1.0, 2.0, 3.0, 4.0])
    m.learn([30.0, 35.0], [2.5, 2.7])
    state = m.to_state()
    assert state["calibration_span"] == [[10.0], [60.0]] and state["input_span"] == [[30.0], [35.0]]
    back = ChannelModel.from_state(m.config, state)
    assert back.operating_ranges() == m.operating_ranges()
    assert back.to_state() == state
    old = {k: v for k, v in state.items() if k not in ("input_span", "calibration_span")} | {"format": 3}
    restored = ChannelModel.from_state(m.config, old)
    assert restored.operating_ranges()[0] == {"name": "raw", "min": 0.0, "max": 100.0, "source": "calibration"}
    restored.learn([70.0], [4.5])  # the first sample since: where the sensor is used
    assert restored.operating_ranges()[0] == {"name": "raw", "min": 70.0, "max": 70.0, "source": "samples"}


def test_the_residual_sd_in_output_units_against_numpy() -> None:
    """Reciprocal output: z = 1 / (y + offset), so |dy/dz| = 1 / z^2; the output-unit s.d. is
    s times its largest value over the operating range (numpy on a fine grid)."""
    m = model_of({"inputs": [{"name": "raw", "unit": "ohm", "min": 1000.0, "max": 40000.0}],
                  "output": {"name": "t", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
                  "basis": {"kind": "poly", "degree": 1}})
    rng = np.random.default_rng(3)
    x = np.linspace(5000.0, 20000.0, 30)
    y = 1.0 / (3.0e-3 + 4.0e-8 * (x - 5000.0)) - 273.15 + rng.normal(0.0, 0.05, x.size)
    report = m.fit_closed_form(x, y)
    s = (np.linspace(5000.0, 20000.0, FINE) - 20500.0) / 19500.0
    z = m.weights[0] + m.weights[1] * s  # T_0 = 1, T_1 = s
    expected = report["residual_sd"] * float(np.max(1.0 / z**2))
    assert report["residual_sd_output"] == pytest.approx(expected, rel=1e-6)
    assert m.residual_sd_output() == pytest.approx(m.residual_sd() * float(np.max(1.0 / z**2)), rel=1e-6)
    assert 0.03 < report["residual_sd_output"] < 0.08  # near the 0.05 degC scatter put in
    plain = model_of({"inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
                      "output": {"name": "t", "unit": "degC"}})
    plain.fit_closed_form([0.0, 50.0, 100.0], [0.0, 50.1, 100.0])
    assert plain.residual_sd_output() == plain.residual_sd()


def test_terms_are_named_once() -> None:
    """The names the API, the page and the command line show, from the exponents."""
    m = model_of({"inputs": [{"name": "current", "unit": "mA", "min": 4, "max": 20},
                             {"name": "temp", "unit": "degC", "min": 0, "max": 50}],
                  "output": {"name": "p", "unit": "bar"}, "basis": {"kind": "poly", "degree": 2}})
    r = m.raw_coefficients()
    assert r["raw_terms"] == [[0, 0], [1, 0], [0, 1], [2, 0], [1, 1], [0, 2]]
    assert r["raw_term_names"] == ["1", "current", "temp", "current^2", "current*temp", "temp^2"]
    t = model_of({"inputs": [{"name": "raw", "unit": "ohm", "min": 100, "max": 1e5}],
                  "output": {"name": "t", "unit": "degC"}, "basis": {"kind": "log_poly"}})
    assert t.raw_coefficients()["raw_term_names"] == ["1", "ln(raw)", "ln(raw)^3"]
