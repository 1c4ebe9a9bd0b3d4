"""Reading reference points and samples from CSV files, with line-numbered errors."""

from __future__ import annotations

import csv
import math
import re
from datetime import datetime
from pathlib import Path
from typing import Any

from .common import LocalError


def _x_columns(header: list[str], path: Path) -> list[str]:
    """``x`` or ``x1, x2, ...`` (in input order)."""
    if "x" in header:
        if any(re.fullmatch(r"x\d+", h) for h in header):
            raise LocalError(f"{path}: use either an x column or x1, x2, ... columns, not both")
        return ["x"]
    numbered = sorted((int(h[1:]), h) for h in header if re.fullmatch(r"x\d+", h))
    if not numbered or [n for n, _ in numbered] != list(range(1, len(numbered) + 1)):
        raise LocalError(f"{path}: the header needs x (one input) or x1, x2, ... (several inputs) and y")
    return [h for _, h in numbered]


def _number(text: str, path: Path, line: int, column: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise LocalError(f"{path} line {line}: {column} is not a number: {text!r}") from None
    if not math.isfinite(v):
        raise LocalError(f"{path} line {line}: {column} is not a finite number: {text!r}")
    return v


def read_points(path: Path, n_inputs: int, *, with_time: bool) -> list[dict[str, Any]]:
    """Rows of a CSV file with a header ``x,y`` or ``x1,...,xn,y`` (and ``t``, ISO-8601 with a time
    zone, when ``with_time``); other columns are ignored. ``{"x", "y"[, "t"], "row"}`` each."""
    with path.open(newline="", encoding="utf-8-sig") as f:
        reader = csv.reader(f)
        header = [h.strip().lower() for h in next(reader, [])]
        if not header:
            raise LocalError(f"{path}: empty file (expected a header line x,y)")
        if "y" not in header:
            raise LocalError(f"{path}: the header has no y column (expected x,y or x1,...,xn,y)")
        xcols = _x_columns(header, path)
        if len(xcols) != n_inputs:
            raise LocalError(f"{path}: {len(xcols)} input column(s), but the channel has {n_inputs} input(s)")
        index = {h: i for i, h in enumerate(header)}
        ti = index.get("t") if with_time else None
        rows: list[dict[str, Any]] = []
        for fields in reader:
            if not any(c.strip() for c in fields):
                continue
            line = reader.line_num
            if len(fields) < len(header):
                raise LocalError(f"{path} line {line}: {len(fields)} field(s), the header has {len(header)}")
            xs = [_number(fields[index[c]].strip(), path, line, c) for c in xcols]
            row: dict[str, Any] = {"x": xs[0] if n_inputs == 1 else xs,
                                   "y": _number(fields[index["y"]].strip(), path, line, "y"),
                                   "row": len(rows) + 1}
            if ti is not None and fields[ti].strip():
                text = fields[ti].strip()
                try:
                    when = datetime.fromisoformat(text.replace("Z", "+00:00"))
                except ValueError:
                    raise LocalError(f"{path} line {line}: t is not an ISO-8601 time: {text!r}") from None
                if when.tzinfo is None:
                    raise LocalError(f"{path} line {line}: t needs a time zone (e.g. {text}Z): {text!r}")
                row["t"] = when.isoformat()
            rows.append(row)
    if not rows:
        raise LocalError(f"{path}: no data rows after the header")
    return rows


# channels -------------------------------------------------------------------------------
