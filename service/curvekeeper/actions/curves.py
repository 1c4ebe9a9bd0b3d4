"""Predict, curve and calibrate."""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import Any

import numpy as np

from ..core import ChannelModel, FitError, InputError
from ..core.scaling import box_grid
from ..csvpoints import CsvProblem, Points, read_points
from ..errors import ChannelNotFound, InvalidRequest, NotCalibrated, PayloadTooLarge, SnapshotNotFound
from . import calibrations, stale
from .channels import load, refresh_due, refuse_archived
from .references import reference_for_use, use_on_channel
from .unit import Unit, item_cost, restore

HISTORY_LIMIT = 1_000_000


def _floats(a: np.ndarray) -> list[float | None]:
    """JSON-ready values: non-finite ones become None (checked in one pass over the array)."""
    out: list[float | None] = a.tolist()
    if not np.isfinite(a).all():
        out = [v if v is not None and math.isfinite(v) else None for v in out]
    return out


def _model_for(unit: Unit, channel_id: str, snapshot: int | None) -> tuple[ChannelModel, int, bool]:
    """The model (the channel's, or a snapshot's), its version, and whether the channel is
    stale now (a snapshot's values come from the same silent channel)."""
    repo = unit.repo
    st = repo.learning_state(channel_id, lock=False)  # a plain row: the cached model holds the rest
    if st is None:
        raise ChannelNotFound(f"no channel {channel_id!r}")
    silent = st.archived_at is None and stale.is_stale(st.stale_after, unit.now())
    if snapshot is None:
        return unit.read_model(st), st.version, silent
    snap = repo.get_snapshot(st.channel_pk, snapshot)
    if snap is None:
        raise SnapshotNotFound(f"channel {channel_id!r} has no snapshot {snapshot}")
    return restore(snap.config, snap.model_state, f"snapshot {snap.pk}"), snap.version, silent


def _inputs(model: ChannelModel, x: list[Any]) -> np.ndarray:
    d = len(model.config["inputs"])
    try:
        X = np.array(x, dtype=np.float64)
    except ValueError:
        X = np.empty((0, 0))
    if (d == 1 and X.ndim == 2 and X.shape[1] == 1) or (d > 1 and X.ndim == 2 and X.shape[1] == d):
        return X
    if d == 1 and X.ndim == 1:
        return X.reshape(-1, 1)
    shape = "a list of numbers" if d == 1 else f"a list of [{', '.join(i['name'] for i in model.config['inputs'])}]"
    raise InvalidRequest(f"x must be {shape}", details={"field": "x"})


def quality(model: ChannelModel, silent: bool) -> dict[str, Any]:
    """What a data user should know about every value the model gives: the core's quality
    flags and ``stale`` (``silent``: no sample received for 3 expected intervals)."""
    return {**model.quality(), "stale": silent}


def _values(model: ChannelModel, X: np.ndarray) -> dict[str, Any]:
    """Per value: y (null where withheld), reason, u, U, k, dof (null: infinite, or u
    unknown) and out_of_range, all JSON-ready lists; raises ``InvalidRequest`` for inputs
    the curve cannot take."""
    try:
        p = model.prediction(X)
    except InputError as exc:
        raise InvalidRequest(exc.message, details={"field": "x", **(exc.details or {})}) from exc
    dof = p.dof.tolist()
    if not np.isfinite(p.dof).all():  # inf: infinitely many degrees of freedom, JSON's null
        dof = [v if math.isfinite(v) else None for v in dof]
    return {"y": _floats(p.y), "reason": p.reason, "u": _floats(p.u), "U": _floats(p.U), "k": _floats(p.k),
            "dof": dof, "out_of_range": p.out_of_range.tolist()}


def predict(unit: Unit, channel_id: str, x: list[Any], snapshot: int | None) -> dict[str, Any]:
    """Calibrated values with their uncertainty from the channel's curve (or a snapshot's);
    raises ``NotCalibrated`` while that model has no curve."""
    model, version, silent = _model_for(unit, channel_id, snapshot)
    X = _inputs(model, x)  # a malformed request is refused before the channel's state is
    if not model.calibrated:
        what = f"snapshot {snapshot} of channel {channel_id!r}" if snapshot is not None else f"channel {channel_id!r}"
        raise NotCalibrated(f"{what} has no calibration curve yet: calibrate it (POST /v1/channels/{channel_id}"
                            "/calibrate) or let it learn from samples first", details={"snapshot": snapshot})
    unit.spend(len(x) * item_cost(model) / 10)  # a prediction costs about a tenth of an update
    out = _values(model, X)
    out.update({"quality": quality(model, silent), "version": version, "unit": model.config["output"]["unit"]})
    return out


def grid_points(model: ChannelModel, grid: np.ndarray) -> list[dict[str, Any]]:
    """The curve at the rows of ``grid`` ((n, d) input units): x, y, u, U, k, and y -/+ U
    (null where y or U is)."""
    v = _values(model, grid)
    single = grid.shape[1] == 1
    pts = []
    for i, xi in enumerate(grid.tolist()):
        yi, Ui = v["y"][i], v["U"][i]
        pts.append({"x": xi[0] if single else xi, "y": yi, "u": v["u"][i], "U": Ui, "k": v["k"][i],
                    "lower": None if yi is None or Ui is None else yi - Ui,
                    "upper": None if yi is None or Ui is None else yi + Ui})
    return pts


def curve(unit: Unit, channel_id: str, points: int, over: str = "input") -> dict[str, Any]:
    """The curve at ``points`` points (per input, see ``box_grid``) over the declared input
    range (``over="input"``) or the operating range (``"operating"``), with its summary."""
    repo = unit.repo
    ch, st = load(repo, channel_id)
    model = unit.read_model(st)
    if over == "operating":
        lo, hi, _ = model.operating_range()
        grid = box_grid(lo, hi, points)
    else:
        grid = model.scaler.grid(points)
    pts = grid_points(model, grid)
    summary = model.summary()
    out: dict[str, Any] = {
        "basis": model.config["basis"], "inputs": model.config["inputs"], "output": model.config["output"],
        "weights": model.weights.tolist(), "over": over, "points": pts, "operating_range": summary["operating_range"],
        "n_samples": st.n_samples, "rmse": summary["rmse"], "residual_sd": summary["residual_sd"],
        "residual_sd_output": summary["residual_sd_output"], "drift": summary["drift"],
        "quality": quality(model, ch.archived_at is None and stale.is_stale(st.stale_after, unit.now())),
        "version": st.version,
    }
    out.update(model.raw_coefficients())
    return out


def _csv_points(csv: str | None, points: list[tuple[list[float], float]], d: int,
                x_columns: list[str | int] | None, y_column: str | int | None, max_points: int) -> Points | None:
    """The points of the csv text (None without one); ``InvalidRequest`` naming the line."""
    if csv is None:
        if x_columns is not None or y_column is not None:
            raise InvalidRequest("x_columns and y_column choose columns of csv: give csv too",
                                 details={"field": "x_columns" if x_columns is not None else "y_column"})
        return None
    if points:
        raise InvalidRequest("give the points either as points or as csv, not both", details={"field": "csv"})
    try:
        read = read_points(csv, d, x_columns, y_column)
    except CsvProblem as exc:
        raise InvalidRequest(exc.message, details={"field": "csv", "line": exc.line}) from exc
    if len(read.y) > max_points:
        raise PayloadTooLarge(f"at most {max_points} points in one calibration; the csv holds {len(read.y)}")
    return read


def calibrate(unit: Unit, channel_id: str, *, points: list[tuple[list[float], float]],
              include_history: bool, since: datetime | None, until: datetime | None, last: int | None,
              label: str | None, key_id: str | None, dry_run: bool = False,
              reason: str | None = None, reference: str | None = None,
              allow_overdue_reference: bool = False, at: datetime | None = None, supersedes: int | None = None,
              conditions: dict[str, Any] | None = None, max_clock_skew_s: float = 300.0, csv: str | None = None,
              x_columns: list[str | int] | None = None, y_column: str | int | None = None,
              max_points: int = HISTORY_LIMIT) -> dict[str, Any]:
    """Fit the points (given, or read from ``csv`` text by ``csvpoints``, and/or stored
    history), make the fit the channel's curve and store its calibration record
    (``record``; done ``at``, default now; correcting the record ``supersedes`` names);
    with ``dry_run``, only report what the fit and the record would be, changing nothing.
    ``reason`` (why, in a person's words) goes into the event for the audit trail; replay
    does not read it. ``reference`` names the reference instrument (checked as
    ``reference_for_use`` does, against the calibration's date); the channel's
    ``reference`` setting then takes its U and k, and the record's budget counts them."""
    repo = unit.repo
    ch, st = load(repo, channel_id, lock=not dry_run)
    refuse_archived(ch)  # a dry run too: it previews a change the channel cannot take
    when = calibrations.check(repo, ch, at=at, supersedes=supersedes, now=datetime.now(UTC),
                              skew_s=max_clock_skew_s)
    use = None if reference is None else reference_for_use(repo, reference, when.date(), allow_overdue_reference)
    config = ch.config if use is None else use_on_channel(ch.config, use)
    model = unit.write_model(st)
    before_model = model.copy()
    d = len(model.config["inputs"])
    read = _csv_points(csv, points, d, x_columns, y_column, max_points)
    if read is not None:
        points = [(x, y) for x, y in zip(read.x, read.y, strict=True)]
    xs: list[list[float]] = []
    ys: list[float] = []
    for i, (x, y) in enumerate(points):
        if len(x) != d:
            raise InvalidRequest(f"point {i}: x needs {d} value(s), one per input", details={"index": i})
        xs.append(x)
        ys.append(y)
    history: dict[str, Any] | None = None
    if not include_history and (since is not None or until is not None or last is not None):
        raise InvalidRequest("since, until and last select stored samples: set include_history to true",
                             details={"field": "include_history"})
    if include_history:
        rows = repo.history(ch.pk, since=since, until=until, last=last, max_seq=st.n_samples,
                            limit=HISTORY_LIMIT + 1)
        if len(rows) > HISTORY_LIMIT:
            raise PayloadTooLarge(f"more than {HISTORY_LIMIT} stored samples match; narrow the window")
        xs.extend(r.x for r in rows)
        ys.extend(r.y for r in rows)
        history = {"n": len(rows), "max_seq": st.n_samples,
                   "since": since.isoformat() if since else None,
                   "until": until.isoformat() if until else None, "last": last}
    if not xs:
        raise InvalidRequest("no points to fit: give points, or include_history with stored samples",
                             details={"field": "points"})
    before_state = model.to_state()
    try:
        report = model.fit_closed_form(np.array(xs, dtype=np.float64).reshape(len(xs), d), np.array(ys))
    except (FitError, InputError) as exc:
        raise InvalidRequest(exc.message, details=exc.details) from exc
    report["csv"] = None if read is None else {"x_columns": read.x_columns, "y_column": read.y_column,
                                               "rows": len(read.y)}
    facts = None if use is None else use.facts()
    report["reference"] = facts
    if config is not ch.config:
        model = model.with_settings(config)  # the record's budget counts the instrument named
    key = repo.get_key(key_id) if key_id else None
    record = {**calibrations.findings(before_model, model, points, report),
              "conditions": conditions or {"values": {}, "note": None},
              "by": key.label if key is not None and key.label else key_id,
              "references": [] if facts is None else [facts]}
    if dry_run:
        report.update({"snapshot_before": None, "snapshot_after": None, "version": st.version, "applied": False,
                       "calibration": None, "record": record})
        return report
    version = st.version + 1
    before = repo.insert_snapshot(ch.pk, reason="before-calibrate", label=label, config=ch.config,
                                  model_state=before_state,
                                  version=st.version, n_samples=st.n_samples)
    if config is not ch.config:
        repo.save_config(ch, config)
    state = model.to_state()
    after = repo.insert_snapshot(ch.pk, reason="calibration", label=label, config=config, model_state=state,
                                 version=version, n_samples=st.n_samples)
    unit.save_model(st, model, version)
    used = {} if use is None else {"reference": facts, "reference_setting": config["reference"]}
    stored = calibrations.store(repo, ch, version=version, at=when, key_id=key_id, supersedes=supersedes,
                                body=record)
    latest = st.last_calibrated_at
    refresh_due(repo, st, ch.config, when if latest is None or when > latest else latest)
    repo.clear_trace(ch.pk)  # the forecast's history starts afresh from the new reference curve
    repo.insert_events([{"channel_pk": ch.pk, "kind": "calibration", "version": version, "key_id": key_id,
                         "details": {"label": label, **({"reason": reason} if reason else {}), **used,
                                     "points": [[x, y] for x, y in points],
                                     "history": history, "n": report["n"],
                                     "residual_sd": report["residual_sd"],
                                     "residual_sd_output": report["residual_sd_output"],
                                     "r_squared": report["r_squared"],
                                     "max_curve_change": report["max_curve_change"],
                                     "snapshot_before": before.pk, "snapshot_after": after.pk,
                                     "record": stored["id"], "at": when.isoformat(), "verdict": record["verdict"],
                                     **({"supersedes": supersedes} if supersedes is not None else {})}}])
    report.update({"snapshot_before": before.pk, "snapshot_after": after.pk, "version": version, "applied": True,
                   "calibration": stored["id"], "record": record})
    return report
