"""Calibration records: what a calibration found and left, judged by the channel's
decision rule, and the due dates that count from them.

A record's points are the calibration's own points (the request's ``points``; samples a
fit takes from the history are fitted, not tabulated). Per point, ``indicated`` is the
curve's value at the point's reading (before the fit for ``as_found``, after it for
``as_left``), ``error`` = indicated - reference_value, ``tolerance`` the channel's
``drift.tolerance``, ``U`` the expanded uncertainty of the as-left curve at the point (the
calibration's uncertainty, the guard band of the ``guarded`` rule in both tables), and
the verdict (``core.conformity``). A channel that had no curve has no as-found
indication: ``indicated`` and ``error`` are null and the verdict ``not_applicable``.
``budget`` is the as-left curve's GUM budget at the point where its U is largest.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np

from ..core import ChannelModel
from ..core.conformity import overall, suggest_interval, verdict
from ..errors import AlreadySuperseded, CalibrationNotFound, InvalidRequest
from ..store import Repository
from ..store.tables import CalibrationRecord, Channel
from .channels import load
from .paging import Page, decode_cursor, encode_cursor


def _num(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None


def _table(X: np.ndarray, y: np.ndarray, indicated: np.ndarray | None, U: np.ndarray, tolerance: float | None,
           rule: str) -> tuple[list[dict[str, Any]], str]:
    """Per point rows (see the module docstring) and their overall verdict."""
    single = X.shape[1] == 1
    rows: list[dict[str, Any]] = []
    for i in range(len(y)):
        ind = None if indicated is None else _num(indicated[i])
        err = None if ind is None else ind - float(y[i])
        u_i = _num(U[i])
        rows.append({"x": float(X[i, 0]) if single else X[i].tolist(), "reference_value": float(y[i]),
                     "indicated": ind, "error": err, "tolerance": tolerance, "U": u_i,
                     "verdict": verdict(err, tolerance, u_i, rule)})
    return rows, overall([r["verdict"] for r in rows])


def _budget(after: ChannelModel, X: np.ndarray) -> tuple[dict[str, Any], np.ndarray]:
    """The as-left budget where U is largest among the points, and U at every point."""
    p = after.prediction(X)
    if p.budget is None or not len(X) or not np.isfinite(p.U).any():
        return {"x": None, "rows": [], "u_combined": None, "dof_effective": None, "k": None, "U": None}, p.U
    i = int(np.nanargmax(p.U))
    b = p.budget
    return {"x": float(X[i, 0]) if X.shape[1] == 1 else X[i].tolist(), "rows": b.rows_at(i),
            "u_combined": _num(b.u[i]), "dof_effective": _num(b.dof[i]), "k": _num(p.k[i]), "U": _num(p.U[i])}, p.U


def _fit(after: ChannelModel, report: dict[str, Any]) -> dict[str, Any]:
    """The fit: basis, coefficients (raw units where the basis has them, else the basis
    weights) with their s.d., residual s.d. in output units and degrees of freedom."""
    n = int(report["n"])
    dof = max(n - after.basis.size, 0)
    raw = "raw_coefficients" in report
    return {"basis": after.config["basis"], "n": n, "dof": dof,
            "coefficients": report["raw_coefficients"] if raw else report["weights"],
            "coefficient_sd": report["raw_coefficient_sd"] if raw else report["weight_sd"],
            "coefficients_of": "raw_terms" if raw else "basis_weights",
            "terms": report.get("raw_terms"),
            "residual_sd": float(report["rmse_output"]) * math.sqrt(n / dof) if dof > 0 else None,
            "r_squared": report["r_squared"]}


#: at most this many points in a record's as-found and as-left tables; a larger fit (a history
#: fit of many samples) keeps the points with the largest as-left |error| there, its verdicts
#: and interval suggestion still judged on every point
TABLE_MAX = 1000


def _shown(as_left: list[dict[str, Any]]) -> list[int]:
    """Indices of the table rows a record keeps: all, or the ``TABLE_MAX`` with the largest
    as-left |error| (in their original order)."""
    if len(as_left) <= TABLE_MAX:
        return list(range(len(as_left)))
    size = np.array([abs(r["error"]) if r["error"] is not None else np.inf for r in as_left])
    return sorted(np.argsort(-size, kind="stable")[:TABLE_MAX].tolist())


def findings(before: ChannelModel, after: ChannelModel, points: list[tuple[list[float], float]],
             report: dict[str, Any]) -> dict[str, Any]:
    """As found, as left, fit, budget, decision rule, overall verdict (the as-left one: the
    state the channel is left in), ``as_found_verdict`` and the interval suggestion, for a
    fit ``report`` that made ``after`` from ``before``."""
    cfg = after.config
    d = len(cfg["inputs"])
    X = np.array([x for x, _ in points], dtype=np.float64).reshape(len(points), d)
    y = np.array([v for _, v in points], dtype=np.float64)
    tol, rule = cfg["drift"]["tolerance"], cfg.get("decision_rule", "simple")
    budget, U = _budget(after, X)
    found_y = before.prediction(X).y if before.calibrated and len(X) else None
    as_found, found = _table(X, y, found_y, U, tol, rule)
    as_left, left = _table(X, y, after.prediction(X).y if len(X) else None, U, tol, rule)
    interval = suggest_interval(cfg["recalibration_interval_days"], [r["error"] for r in as_found], tol)
    keep = _shown(as_left)
    table = {"points": len(as_left), "shown": len(keep),
             "selection": "all" if len(keep) == len(as_left) else "largest_as_left_error"}
    return {"as_found": [as_found[i] for i in keep], "as_left": [as_left[i] for i in keep], "table": table,
            "fit": _fit(after, report), "budget": budget, "decision_rule": rule, "verdict": left,
            "as_found_verdict": found, "interval_suggestion": interval}


def check(repo: Repository, ch: Channel, *, at: datetime | None, supersedes: int | None, now: datetime,
          skew_s: float) -> datetime:
    """The record's time (``at``, default ``now``; one less than ``skew_s`` seconds ahead of
    ``now``, clocks differing a little, is taken as now); refuses an ``at`` further in the
    future, and a ``supersedes`` that is not a record of this channel or is superseded already."""
    if at is not None and at > now + timedelta(seconds=skew_s):
        raise InvalidRequest(f"at ({at.isoformat()}) is in the future; a calibration is recorded once done",
                             details={"field": "at"})
    if supersedes is not None:
        found = repo.get_record(ch.pk, supersedes)
        if found is None:
            raise CalibrationNotFound(f"channel {ch.id!r} has no calibration record {supersedes} to supersede",
                                      details={"field": "supersedes"})
        if found[1] is not None:
            raise AlreadySuperseded(f"calibration record {supersedes} is superseded by record {found[1]} already; "
                                    f"supersede that one instead", details={"superseded_by": found[1]})
    return min(at, now) if at is not None else now


def store(repo: Repository, ch: Channel, *, version: int, at: datetime, key_id: str | None,
          supersedes: int | None, body: dict[str, Any]) -> dict[str, Any]:
    """Write the record (``body``: findings, conditions, by, references) and answer it."""
    rec = repo.insert_record(CalibrationRecord(channel_pk=ch.pk, version=version, at=at, created_at=datetime.now(UTC),
                                               key_id=key_id, verdict=body["verdict"], supersedes=supersedes,
                                               record=body))
    return view(ch, rec, None)


def view(ch: Channel, rec: CalibrationRecord, superseded_by: int | None) -> dict[str, Any]:
    return {**rec.record, "id": rec.pk, "channel": ch.id, "version": rec.version, "at": rec.at,
            "created_at": rec.created_at, "key_id": rec.key_id, "supersedes": rec.supersedes,
            "superseded_by": superseded_by}


def list_(repo: Repository, channel_id: str, *, cursor: str | None, limit: int) -> Page:
    ch, _ = load(repo, channel_id)
    rows = repo.list_records(ch.pk, after_pk=decode_cursor(cursor), limit=limit + 1)
    items = [view(ch, rec, succ) for rec, succ in rows[:limit]]
    return Page(items, encode_cursor(rows[limit - 1][0].pk) if len(rows) > limit else None)


def get(repo: Repository, channel_id: str, record_id: int) -> dict[str, Any]:
    ch, _ = load(repo, channel_id)
    found = repo.get_record(ch.pk, record_id)
    if found is None:
        raise CalibrationNotFound(f"channel {channel_id!r} has no calibration record {record_id}")
    return view(ch, *found)
