"""Samples from CSV files for ``samples load``, by the service's own reader (``curvekeeper.csvpoints``),
with line-numbered errors."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import Any

from ..csvpoints import CsvProblem, read_table
from ..csvpoints import read_points as read_csv_points
from .common import LocalError


def read_samples(path: Path, n_inputs: int, *, with_time: bool) -> list[dict[str, Any]]:
    """Rows of a CSV file read by the service's reader (``curvekeeper.csvpoints``: comment
    lines, ',' ';' or tab, a header's x / x1 ... xn and y, else the first columns), with a
    ``t`` column (ISO-8601 with a time zone) when ``with_time`` and the header has one.
    ``{"x", "y"[, "t"], "row"}`` each; ``LocalError`` naming the file and line."""
    text = path.read_text(encoding="utf-8-sig")
    try:
        table = read_table(text)
        points = read_csv_points(text, n_inputs)
    except CsvProblem as exc:
        raise LocalError(f"{path}: {exc.message}") from None
    header = [h.lower() for h in table.header or []]
    ti = header.index("t") if with_time and "t" in header else None
    rows: list[dict[str, Any]] = []
    for (line, fields), x, y in zip(table.rows, points.x, points.y, strict=True):
        row: dict[str, Any] = {"x": x[0] if n_inputs == 1 else x, "y": y, "row": len(rows) + 1}
        if ti is not None and ti < len(fields) and fields[ti]:
            try:
                when = datetime.fromisoformat(fields[ti].replace("Z", "+00:00"))
            except ValueError:
                raise LocalError(f"{path} line {line}: t is not an ISO-8601 time: {fields[ti]!r}") from None
            if when.tzinfo is None:
                raise LocalError(f"{path} line {line}: t needs a time zone (e.g. {fields[ti]}Z): {fields[ti]!r}")
            row["t"] = when.isoformat()
        rows.append(row)
    return rows


# channels -------------------------------------------------------------------------------
