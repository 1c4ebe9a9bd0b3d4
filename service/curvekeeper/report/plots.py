"""The report's figures, drawn by matplotlib (Agg, no display) into PNG bytes: the curve
with its k·u band and the calibration points, and the errors at the points."""

from __future__ import annotations

import io
from collections.abc import Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")  # before pyplot: the service has no display
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

SIZE = (7.0, 3.2)  # inches: one figure across an A4 page's text width
DPI = 150


def first(x: Any) -> float:
    """A point's first input: the plots' x axis (a multi-input channel is shown against it)."""
    return float(x[0]) if isinstance(x, list | tuple) else float(x)


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()


def _known(points: Sequence[dict[str, Any]], *keys: str) -> list[dict[str, Any]]:
    return [p for p in points if all(p.get(k) is not None for k in keys)]


def curve_plot(points: Sequence[dict[str, Any]], curve: Sequence[dict[str, Any]] | None, U: float | None,
               x_label: str, y_label: str) -> bytes:
    """The curve after the fit with its band +- U (the budget's expanded uncertainty, k·u),
    and the reference values at the calibration points. ``points``: the as-left rows (x,
    reference_value, indicated); ``curve``: optional {x, y, U} on a grid (the channel's
    curve); without it the line joins the as-left indications."""
    fig, ax = plt.subplots(figsize=SIZE)
    line = _known(curve or [], "x", "y") or _known(points, "x", "indicated")
    line = sorted(line, key=lambda p: first(p["x"]))
    xs = [first(p["x"]) for p in line]
    ys = [float(p["y"] if "y" in p else p["indicated"]) for p in line]
    if xs:
        ax.plot(xs, ys, color="#1f4e79", lw=1.5, label="curve after calibration")
        given = [float(p["U"]) if p.get("U") is not None else U for p in line]
        band = [b for b in given if b is not None]
        if len(band) == len(ys):
            ax.fill_between(xs, [y - b for y, b in zip(ys, band, strict=True)],
                            [y + b for y, b in zip(ys, band, strict=True)],
                            color="#1f4e79", alpha=0.18, lw=0, label="± U (k·u)")
    ref = _known(points, "x", "reference_value")
    ax.plot([first(p["x"]) for p in ref], [float(p["reference_value"]) for p in ref], "o", ms=4,
            color="#c0504d", label="reference values")
    ax.set_xlabel(x_label)
    ax.set_ylabel(y_label)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    return _png(fig)


def error_plot(as_found: Sequence[dict[str, Any]], as_left: Sequence[dict[str, Any]], U: float | None,
               x_label: str, y_label: str) -> bytes:
    """Errors (indicated - reference) at the points, as found and as left, with the
    tolerance (a step line through each point's own) and +- U about zero."""
    fig, ax = plt.subplots(figsize=SIZE)
    for rows, style, label in ((as_found, "s", "as found"), (as_left, "o", "as left")):
        pts = _known(rows, "x", "error")
        ax.plot([first(p["x"]) for p in pts], [float(p["error"]) for p in pts], style, ms=4, label=label,
                mfc="none" if style == "s" else None)
    tol = sorted(_known(list(as_left) or list(as_found), "x", "tolerance"), key=lambda p: first(p["x"]))
    if tol:
        xs = [first(p["x"]) for p in tol]
        ts = [float(p["tolerance"]) for p in tol]
        ax.step(xs, ts, where="mid", color="#7f7f7f", ls="--", lw=1, label="± tolerance")
        ax.step(xs, [-t for t in ts], where="mid", color="#7f7f7f", ls="--", lw=1)
    if U is not None:
        ax.axhspan(-U, U, color="#1f4e79", alpha=0.12, lw=0, label="± U")
    ax.axhline(0.0, color="black", lw=0.6)
    ax.set_xlabel(x_label)
    ax.set_ylabel(f"error, {y_label}")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    return _png(fig)
