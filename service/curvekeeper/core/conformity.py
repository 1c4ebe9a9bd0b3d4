"""Conformity with a tolerance, recalibration intervals and due dates.

Decision rules (ILAC-G8:2019, clause 4.2): a measured error e with expanded uncertainty
U is judged against the tolerance T (the largest |e| allowed, output units) with a guard
band w:

- ``simple`` (simple acceptance, w = 0): ``pass`` when |e| <= T, else ``fail``;
- ``guarded`` (w = U): ``pass`` when |e| <= T - U, ``fail`` when |e| > T + U, and
  ``conditional`` in between (conformity can be neither stated nor refuted there).

``not_applicable``: nothing to judge (no tolerance set, or no indication, e.g. the
as-found of a channel that had no curve). Under ``guarded`` an unknown U (a fit with no
residual degrees of freedom and no other stated uncertainty) leaves the guard band
unknown: such a point is ``conditional``.

Intervals (ILAC-G24 / OIML D 10, method 1, the "staircase"): after each calibration the
interval is multiplied by ``GROW`` when every as-found error lay within the tolerance,
by ``SHRINK`` otherwise, and kept within [``MIN_DAYS``, ``MAX_DAYS``]. The factors and
bounds are common practice, not taken from the documents (which leave them to the lab).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import date, timedelta
from typing import Any, Literal

Rule = Literal["simple", "guarded"]
Verdict = Literal["pass", "fail", "conditional", "not_applicable"]
DueState = Literal["ok", "due_soon", "overdue"]

RULES: tuple[str, ...] = ("simple", "guarded")
#: staircase factors: in tolerance as found -> x GROW, out -> x SHRINK (common practice)
GROW = 1.25
SHRINK = 0.5
#: bounds of a suggested interval, days (common practice: a month to five years)
MIN_DAYS = 30
MAX_DAYS = 1825
#: the recalibration interval of a channel that states none, days (common practice: yearly)
DEFAULT_INTERVAL_DAYS = 365
#: how long before its due date a channel is due soon, days (common practice)
DEFAULT_DUE_SOON_DAYS = 30


def verdict(error: float | None, tolerance: float | None, U: float | None, rule: str) -> Verdict:
    """The verdict for one point: ``error`` (indicated - reference), ``tolerance`` (>= 0)
    and ``U`` (expanded uncertainty of the error) in output units; None: unknown."""
    if rule not in RULES:
        raise ValueError(f"decision rule must be one of {', '.join(RULES)}, got {rule!r}")
    if tolerance is None or error is None or not math.isfinite(error):
        return "not_applicable"
    e = abs(error)
    if rule == "simple":
        return "pass" if e <= tolerance else "fail"
    if U is None or not math.isfinite(U):
        return "conditional"
    if e <= tolerance - U:
        return "pass"
    return "fail" if e > tolerance + U else "conditional"


def overall(verdicts: Sequence[str]) -> Verdict:
    """One verdict for several points: ``fail`` if any fails, else ``conditional`` if any is
    conditional or a judged set has a point that could not be judged, else ``pass``;
    ``not_applicable`` when none could be judged."""
    judged = [v for v in verdicts if v != "not_applicable"]
    if not judged:
        return "not_applicable"
    if "fail" in judged:
        return "fail"
    return "conditional" if "conditional" in judged or len(judged) < len(verdicts) else "pass"


def suggest_interval(current_days: int, errors: Sequence[float | None], tolerance: float | None
                     ) -> dict[str, Any]:
    """The staircase's next interval from the as-found ``errors`` (output units, None where
    there was no indication): ``days`` suggested, ``current_days``, ``factor`` applied
    and ``basis`` (``in_tolerance``, ``out_of_tolerance``; ``no_tolerance`` or
    ``no_as_found`` leave the interval as it is), with ``method``."""
    known = [abs(e) for e in errors if e is not None and math.isfinite(e)]
    if tolerance is None:
        basis, factor = "no_tolerance", 1.0
    elif not known:
        basis, factor = "no_as_found", 1.0
    elif max(known) <= tolerance:
        basis, factor = "in_tolerance", GROW
    else:
        basis, factor = "out_of_tolerance", SHRINK
    days = current_days if factor == 1.0 else min(max(round(current_days * factor), MIN_DAYS), MAX_DAYS)
    return {"days": int(days), "current_days": int(current_days), "factor": factor, "basis": basis,
            "method": f"staircase (ILAC-G24 / OIML D 10 method 1): x{GROW} in tolerance as found, x{SHRINK} "
                      f"out, within {MIN_DAYS} to {MAX_DAYS} days"}


def due_on(calibrated_on: date, interval_days: int) -> date:
    """The date a channel calibrated on ``calibrated_on`` is due again."""
    return calibrated_on + timedelta(days=interval_days)


def due_state(due: date | None, today: date, window_days: int) -> DueState | None:
    """``overdue`` after the due date, ``due_soon`` from ``window_days`` before it to the
    date itself, ``ok`` before; None for a channel with no due date (never calibrated)."""
    if due is None:
        return None
    if today > due:
        return "overdue"
    return "due_soon" if today >= due - timedelta(days=window_days) else "ok"
