"""A calibration record's PDF report for a channel: the channel as its answer gives it
(forecast included) and the curve the calibration left, with its expanded uncertainty,
rendered by ``curvekeeper.report``."""

from __future__ import annotations

import re
from typing import Any

from . import calibrations
from .channels import get, load
from .curves import grid_points
from .unit import Unit, restore

CURVE_POINTS = 101  # grid points of the curve drawn with its k·u band


def filename(channel_id: str, record: dict[str, Any]) -> str:
    """A file name for the report: the channel and the record id, safe in any file system."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", f"calibration-{channel_id}-{record.get('id', 'record')}.pdf")


def calibration_report(unit: Unit, channel_id: str, record_id: int) -> tuple[bytes, str]:
    """The PDF bytes and a file name of calibration record ``record_id`` of this channel
    with the channel's answer and the curve that calibration left (x, y, U on a grid, from
    the snapshot it took; a one-input channel's only, the plots' x axis). Raises
    ``ChannelNotFound``, ``CalibrationNotFound``."""
    from ..report import render_report  # matplotlib loads on the first report, not at start

    record = calibrations.get(unit.repo, channel_id, record_id)
    channel = get(unit, channel_id)
    points = None
    ch, _ = load(unit.repo, channel_id)
    snap = unit.repo.calibration_snapshot(ch.pk, record["version"])
    if snap is not None and len(channel["inputs"]) == 1:
        model = restore(snap.config, snap.model_state, f"snapshot {snap.pk}")
        points = [{"x": p["x"], "y": p["y"], "U": p["U"]} for p in grid_points(model, model.scaler.grid(CURVE_POINTS))]
    return render_report(record, channel, curve=points), filename(channel_id, record)
