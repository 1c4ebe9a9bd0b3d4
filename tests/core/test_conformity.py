"""Decision rules, the interval staircase and due dates (core/conformity.py).

The decision rules are those of ILAC-G8:2019 (Guidelines on Decision Rules and Statements
of Conformity), clause 4.2.1 (simple acceptance, guard band w = 0) and 4.2.2 (guard band
w = U): acceptance limit AL = T - w, rejection beyond T + w, "conditional" in between.
Each case is worked by hand in its comment; the rules are quoted from memory.
"""

from __future__ import annotations

from datetime import date

import pytest
from curvekeeper.core.conformity import (
    GROW,
    MAX_DAYS,
    MIN_DAYS,
    SHRINK,
    due_on,
    due_state,
    overall,
    suggest_interval,
    verdict,
)

# (error, tolerance, U, rule, verdict), output units; T = 0.5 degC throughout
CASES = [
    # simple acceptance: |e| <= T passes, whatever U
    (0.30, 0.5, 0.10, "simple", "pass"),    # 0.30 <= 0.5
    (-0.50, 0.5, 0.10, "simple", "pass"),   # |-0.50| = 0.5 <= 0.5: on the limit passes
    (0.51, 0.5, 0.10, "simple", "fail"),    # 0.51 > 0.5
    (-0.45, 0.5, 0.30, "simple", "pass"),   # U does not enter: 0.45 <= 0.5
    # guard band w = U = 0.1: AL = 0.5 - 0.1 = 0.4, rejection above 0.5 + 0.1 = 0.6
    (0.30, 0.5, 0.10, "guarded", "pass"),         # 0.30 <= 0.4
    (-0.40, 0.5, 0.10, "guarded", "pass"),        # 0.40 <= 0.4
    (0.45, 0.5, 0.10, "guarded", "conditional"),  # 0.4 < 0.45 <= 0.6
    (-0.60, 0.5, 0.10, "guarded", "conditional"), # 0.60 <= 0.6: not beyond T + U
    (0.61, 0.5, 0.10, "guarded", "fail"),         # 0.61 > 0.6
    # a guard band as wide as the tolerance (U = T = 0.5): AL = 0, only e = 0 passes
    (0.0, 0.5, 0.5, "guarded", "pass"),
    (0.01, 0.5, 0.5, "guarded", "conditional"),   # 0 < 0.01 <= 1.0
    (1.2, 0.5, 0.5, "guarded", "fail"),           # 1.2 > 1.0
    # nothing to judge, or no guard band to apply
    (0.3, None, 0.1, "simple", "not_applicable"),
    (None, 0.5, 0.1, "guarded", "not_applicable"),
    (0.1, 0.5, None, "guarded", "conditional"),
    (0.1, 0.5, None, "simple", "pass"),
]


@pytest.mark.parametrize(("error", "tolerance", "U", "rule", "expected"), CASES)
def test_the_decision_rules_of_ilac_g8(error: float | None, tolerance: float | None, U: float | None, rule: str,
                                       expected: str) -> None:
    assert verdict(error, tolerance, U, rule) == expected


def test_an_unknown_rule_is_refused() -> None:
    with pytest.raises(ValueError, match="decision rule"):
        verdict(0.1, 0.5, 0.1, "shared_risk")


@pytest.mark.parametrize(("verdicts", "expected"), [
    (["pass", "pass"], "pass"),
    (["pass", "conditional", "pass"], "conditional"),
    (["conditional", "fail", "pass"], "fail"),
    (["not_applicable", "not_applicable"], "not_applicable"),
    (["pass", "not_applicable"], "conditional"),  # a point not judged: conformity not stated for all
    ([], "not_applicable"),
])
def test_the_overall_verdict(verdicts: list[str], expected: str) -> None:
    assert overall(verdicts) == expected


def test_the_staircase_grows_in_tolerance_and_shrinks_out() -> None:
    # 365 d in tolerance: 365 x 1.25 = 456.25 -> 456 d; out: 365 x 0.5 = 182.5 -> 182 d
    # (Python rounds half to even)
    assert (GROW, SHRINK) == (1.25, 0.5)
    grown = suggest_interval(365, [0.1, -0.2], 0.5)
    assert (grown["days"], grown["basis"], grown["factor"]) == (456, "in_tolerance", 1.25)
    shrunk = suggest_interval(365, [0.1, -0.6], 0.5)
    assert (shrunk["days"], shrunk["basis"]) == (182, "out_of_tolerance")
    # on the tolerance counts as within it (|e| <= T)
    assert suggest_interval(100, [0.5], 0.5)["days"] == 125
    # bounded: 1700 x 1.25 = 2125 -> MAX_DAYS; 40 x 0.5 = 20 -> MIN_DAYS
    assert suggest_interval(1700, [0.0], 0.5)["days"] == MAX_DAYS
    assert suggest_interval(40, [9.0], 0.5)["days"] == MIN_DAYS
    # nothing to go on: the interval stays as it is
    assert suggest_interval(365, [None, None], 0.5)["days"] == 365
    assert suggest_interval(365, [0.1], None)["basis"] == "no_tolerance"


def test_due_dates_and_states() -> None:
    due = due_on(date(2026, 1, 31), 365)
    assert due == date(2027, 1, 31)  # 2026 is not a leap year: 365 days is one calendar year
    window = 30  # due soon from 2027-01-01 (31 days in January, 31 - 30 = the 1st)
    assert due_state(due, date(2026, 12, 31), window) == "ok"
    assert due_state(due, date(2027, 1, 1), window) == "due_soon"
    assert due_state(due, date(2027, 1, 31), window) == "due_soon"  # due that day, not yet overdue
    assert due_state(due, date(2027, 2, 1), window) == "overdue"
    assert due_state(None, date(2027, 2, 1), window) is None
