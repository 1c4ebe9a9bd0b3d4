"""CSV cells that a spreadsheet opens as text, never as a formula.

A cell starting with ``=``, ``+``, ``-`` or ``@`` (or a tab or carriage return, which some
spreadsheets skip before looking) is run as a formula when the file is opened; a stored
``source`` such as ``=HYPERLINK(...)`` would then act for whoever opens the export. Text
cells that start so get a leading single quote, which spreadsheets show as text. Numeric
columns are written as they are: ``-1.5`` must stay a number.
"""

from __future__ import annotations

import csv
from collections.abc import Iterable, Sequence
from typing import Any, Protocol

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
# the export columns that hold free text (a sender's or a person's words, or a reason code)
TEXT_COLUMNS = frozenset({"source", "reason", "label"})


class _Writer(Protocol):
    def writerow(self, row: Iterable[Any], /) -> Any: ...


def neutralise(cell: str) -> str:
    """``cell`` with a leading ``'`` if a spreadsheet would read it as a formula."""
    return "'" + cell if cell.startswith(FORMULA_STARTS) else cell


class TextSafeWriter:
    """A ``csv.writer`` whose rows have the cells of the text columns (by header name)
    neutralised; the header row itself is written as given."""

    def __init__(self, f: Any, fields: Sequence[str], text: Iterable[str] = TEXT_COLUMNS) -> None:
        self._writer: _Writer = csv.writer(f, lineterminator="\n")
        names = set(text)
        self._text = [i for i, name in enumerate(fields) if name in names]

    def writerow(self, row: Sequence[Any]) -> None:
        cells = list(row)
        for i in self._text:
            if i < len(cells) and isinstance(cells[i], str):
                cells[i] = neutralise(cells[i])
        self._writer.writerow(cells)
