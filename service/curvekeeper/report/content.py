"""What the report says, as plain text and table rows: number formats, the record's parts
in reading order, the fixed statements. No layout here (``pdf.py`` lays it out)."""

from __future__ import annotations

import hashlib
import json
from datetime import date, datetime
from typing import Any

ONLY_THE_ITEM = ("The results in this report relate only to the item calibrated, under the conditions stated, "
                 "at the time of calibration.")
CAUTION = ("Caution: curvekeeper supports calibration work; it does not replace traceable, accredited "
           "calibration nor the regulations where the sensor is used.")
DECISION_RULES = {
    "simple": "simple acceptance (guard band w = 0): a point passes when |error| <= tolerance.",
    "guarded": ("guarded acceptance (guard band w = U): a point passes when |error| <= tolerance - U, fails when "
                "|error| > tolerance + U, and is conditional in between."),
}
POINT_COLUMNS = ("x", "reference value", "indicated", "error", "tolerance", "verdict")
BUDGET_COLUMNS = ("source", "type", "distribution", "u", "sensitivity", "contribution", "dof")
REFERENCE_COLUMNS = ("reference", "description", "certificate", "calibrated on", "due on", "U (k)")


def num(v: Any) -> str:
    """A number as the report prints it: up to 6 significant digits; '-' when unknown."""
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "inf" if v == float("inf") else f"{v:.6g}"
    if isinstance(v, list | tuple):
        return ", ".join(num(x) for x in v)
    return str(v)


def when(v: Any) -> str:
    """A date or time as ISO-8601 text (UTC as given), '-' when unknown."""
    if v is None:
        return "-"
    if isinstance(v, datetime):
        return v.isoformat(timespec="seconds")
    if isinstance(v, date):
        return v.isoformat()
    return str(v)


def report_id(record: dict[str, Any], channel: dict[str, Any]) -> str:
    """A report id unique to the record's content: the channel, the record's id and the
    first 10 hex digits of the SHA-256 of the record (a correcting record gets another)."""
    digest = hashlib.sha256(json.dumps(record, sort_keys=True, default=str).encode()).hexdigest()[:10]
    return f"CKR-{channel.get('id', '?')}-{record.get('id', '?')}-{digest}"


def inputs_text(channel: dict[str, Any]) -> str:
    parts = []
    for i, spec in enumerate(channel.get("inputs") or []):
        name = spec.get("name") or f"x{i}"
        parts.append(f"{name} [{spec.get('unit', '')}], {num(spec.get('min'))} to {num(spec.get('max'))}")
    return "; ".join(parts) or "-"


def output_text(channel: dict[str, Any]) -> str:
    out = channel.get("output") or {}
    return f"{out.get('name', 'value')} [{out.get('unit', '')}]"


def method_text(channel: dict[str, Any], record: dict[str, Any]) -> str:
    """How the curve is made: the basis, the output transform and the fit."""
    basis = (record.get("fit") or {}).get("basis") or channel.get("basis") or {}
    kind = basis.get("kind", "?") if isinstance(basis, dict) else str(basis)
    extra = ", ".join(f"{k} {num(v)}" for k, v in basis.items() if k != "kind") if isinstance(basis, dict) else ""
    transform = (channel.get("output") or {}).get("transform", "none")
    return (f"least-squares fit of a {kind} basis ({extra or 'defaults'}) to the calibration points, output "
            f"transform {transform}; uncertainty by the GUM law of propagation, Welch-Satterthwaite "
            f"degrees of freedom, k from Student's t.")


def point_rows(points: list[dict[str, Any]]) -> list[list[str]]:
    return [[num(p.get("x")), num(p.get("reference_value")), num(p.get("indicated")), num(p.get("error")),
             num(p.get("tolerance")), str(p.get("verdict") or "-")] for p in points]


def budget_parts(budget: Any) -> tuple[list[list[str]], list[tuple[str, str]]]:
    """(rows, totals): the budget's rows in ``BUDGET_COLUMNS`` order and its u_combined,
    dof_effective, k and U."""
    rows = budget.get("rows", []) if isinstance(budget, dict) else list(budget or [])
    body = [[str(r.get("source", "-")), str(r.get("type", "-")), str(r.get("distribution", "-")),
             num(r.get("u")), num(r.get("sensitivity")), num(r.get("contribution")), num(r.get("dof"))]
            for r in rows]
    b = budget if isinstance(budget, dict) else {}
    totals = [("combined standard uncertainty u_c", num(b.get("u_combined"))),
              ("effective degrees of freedom", num(b.get("dof_effective"))),
              ("coverage factor k", num(b.get("k"))), ("expanded uncertainty U = k·u_c", num(b.get("U")))]
    return body, totals


def reference_rows(refs: list[Any]) -> list[list[str]]:
    rows = []
    for r in refs:
        if not isinstance(r, dict):
            rows.append([str(r), "-", "-", "-", "-", "-"])
            continue
        U = r.get("expanded_uncertainty")
        rows.append([str(r.get("id", "-")), str(r.get("description") or "-"), str(r.get("certificate") or "-"),
                     when(r.get("calibrated_on")), when(r.get("due_on")),
                     "-" if U is None else f"{num(U)} {r.get('unit', '')} (k = {num(r.get('coverage_factor'))})"])
    return rows


def _words(key: Any) -> str:
    return str(key).replace("_", " ")


def pairs(v: Any) -> list[tuple[str, str]]:
    """Free key/value pairs (and free text) as (key, text) lines."""
    if v is None:
        return []
    if isinstance(v, dict):
        out: list[tuple[str, str]] = []
        for k, x in v.items():
            if isinstance(x, dict):
                out.extend((f"{_words(k)}: {_words(k2)}", num(x2)) for k2, x2 in x.items())
            else:
                out.append((_words(k), num(x)))
        return out
    return [("", str(v))]


def forecast_text(f: dict[str, Any] | None) -> str | None:
    if not f:
        return None
    if f.get("not_within_days") is not None:
        return f"not expected to leave tolerance within {f['not_within_days']} days (drift rate {num(f.get('rate'))} " \
               "per day)."
    return (f"expected to leave tolerance on {when(f.get('leaves_tolerance_on'))} (interval {when(f.get('low'))} to "
            f"{when(f.get('high'))}; drift rate {num(f.get('rate'))} per day). Method: {f.get('method', '-')}.")
