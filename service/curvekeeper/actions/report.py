"""A calibration record's PDF report for a channel: the channel as its answer gives it
(forecast included) and its curve with the expanded uncertainty, rendered by
``curvekeeper.report``. The route and the command line fetch the record, then call this."""

from __future__ import annotations

import re
from typing import Any

from .channels import get
from .curves import curve
from .unit import Unit

CURVE_POINTS = 101  # grid points of the curve drawn with its k·u band


def filename(channel_id: str, record: dict[str, Any]) -> str:
    """A file name for the report: the channel and the record id, safe in any file system."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", f"calibration-{channel_id}-{record.get('id', 'record')}.pdf")


def calibration_report(unit: Unit, channel_id: str, record: dict[str, Any]) -> bytes:
    """The PDF bytes of ``record`` (a calibration record of this channel, the shape of ``GET
    .../calibrations/{cal}``) with the channel's answer and its current curve (x, y, U on a
    grid; a one-input channel's curve only, the plots' x axis). Raises ``ChannelNotFound``."""
    from ..report import render_report  # matplotlib loads on the first report, not at start

    channel = get(unit, channel_id)
    points = None
    if len(channel["inputs"]) == 1 and channel["calibrated"]:
        points = [{"x": p["x"], "y": p["y"], "U": p["U"]} for p in curve(unit, channel_id, CURVE_POINTS)["points"]]
    return render_report(record, channel, curve=points)
