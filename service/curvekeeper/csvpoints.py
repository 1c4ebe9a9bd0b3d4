"""Reference points from CSV text: the one reader behind bench calibration. The page and
the command line send the file's text to the calibrate route, which reads it here, so
both take the same files and give the same messages.

The rules: blank lines and lines starting with ``#`` are skipped; fields are separated by
``,``, ``;`` or a tab (whichever the first row holds most of); the first row is a header
when any of its fields is not a number, and then columns may be named (case-insensitive)
as well as numbered (1, 2, ... from the left). Columns: ``x_columns`` (one per input, in
the channel's input order) and ``y_column``; by default the header's ``y`` and ``x`` (or
``x1`` ... ``xn``) where it has them, else the first n columns are the inputs and the next
one the reference value. Other columns are ignored. Numbers are finite decimals.
"""

from __future__ import annotations

import csv
import math
import re
from dataclasses import dataclass

DELIMITERS = (",", ";", "\t")


class CsvProblem(ValueError):
    """What is wrong with the text, in the file's own terms (line numbers from 1)."""

    def __init__(self, message: str, line: int | None = None) -> None:
        super().__init__(f"line {line}: {message}" if line is not None else message)
        self.message = str(self)
        self.line = line


@dataclass
class Table:
    """The rows of a CSV text: ``header`` (names, or None when the first row is data) and
    ``rows`` as (line number, fields), fields stripped of spaces."""

    header: list[str] | None
    rows: list[tuple[int, list[str]]]


@dataclass
class Points:
    """Reference points read from a table: x (n, d) raw inputs, y (n,), the line each came
    from, and the columns used (by header name, or ``column 2`` without a header)."""

    x: list[list[float]]
    y: list[float]
    lines: list[int]
    x_columns: list[str]
    y_column: str


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def read_table(text: str) -> Table:
    """The header and data rows of CSV ``text`` (see the module's rules)."""
    numbered = [(i + 1, line) for i, line in enumerate(text.lstrip("\ufeff").splitlines())
                if line.strip() and not line.lstrip().startswith("#")]
    if not numbered:
        raise CsvProblem("no rows: the text is empty or holds only comment lines")
    first = numbered[0][1]
    delimiter = max(DELIMITERS, key=first.count)  # the first of the most frequent
    rows = [(n, [f.strip() for f in next(csv.reader([line], delimiter=delimiter), [])]) for n, line in numbered]
    if any(not _is_number(f) for f in rows[0][1]):
        return Table(rows[0][1], rows[1:])
    return Table(None, rows)


def _index(table: Table, spec: str | int, role: str) -> int:
    """The 0-based column of ``spec``: a header name, else a position from 1."""
    width = max(len(table.header or []), max((len(f) for _, f in table.rows), default=0))
    lower = [h.lower() for h in table.header or []]
    if isinstance(spec, str) and spec.strip().lower() in lower:
        return lower.index(spec.strip().lower())
    if isinstance(spec, int) or re.fullmatch(r"\s*\d+\s*", spec):
        pos = int(spec)
        if 1 <= pos <= width:
            return pos - 1
        raise CsvProblem(f"{role} column {pos} does not exist: the rows have {width} column(s)")
    names = ", ".join(table.header) if table.header else "none: the first row holds numbers"
    raise CsvProblem(f"{role} column {spec!r} is not in the header (its columns: {names})")


def _defaults(table: Table, n_inputs: int) -> tuple[list[int], int]:
    """The header's y (else the column after the inputs) and x or x1 ... xn (else the first
    columns besides y)."""
    h = [] if table.header is None else [c.lower() for c in table.header]
    numbered = [c for c in h if re.fullmatch(r"x\d+", c)]
    if numbered and len(numbered) != n_inputs:
        raise CsvProblem(f"the header names {len(numbered)} input column(s) ({', '.join(numbered)}), but the "
                         f"channel has {n_inputs} input(s)")
    yi = h.index("y") if "y" in h else n_inputs
    xs = ["x"] if n_inputs == 1 else [f"x{i + 1}" for i in range(n_inputs)]
    if all(x in h for x in xs):
        return [h.index(x) for x in xs], yi
    return [i for i in range(n_inputs + 1) if i != yi][:n_inputs], yi


def read_points(text: str, n_inputs: int, x_columns: list[str | int] | None = None,
                y_column: str | int | None = None) -> Points:
    """The reference points of CSV ``text`` for a channel of ``n_inputs`` inputs; raises
    ``CsvProblem`` naming the line and column at fault."""
    table = read_table(text)
    if x_columns is not None and len(x_columns) != n_inputs:
        raise CsvProblem(f"{len(x_columns)} x column(s) given, but the channel has {n_inputs} input(s)")
    if x_columns is None and y_column is None:
        xi, yi = _defaults(table, n_inputs)
    elif x_columns is None:  # the first n columns besides y
        yi = _index(table, y_column, "y")  # type: ignore[arg-type]
        xi = [i for i in range(n_inputs + 1) if i != yi][:n_inputs]
    else:
        xi = [_index(table, c, "x") for c in x_columns]
        # y: as given, else the first column not taken as an input
        yi = (_index(table, y_column, "y") if y_column is not None
              else next(i for i in range(n_inputs + 1) if i not in xi))
    if yi in xi or len(set(xi)) != len(xi):
        raise CsvProblem("a column is used twice: give distinct x and y columns")

    def name(i: int) -> str:
        return table.header[i] if table.header is not None and i < len(table.header) else f"column {i + 1}"

    x: list[list[float]] = []
    y: list[float] = []
    lines: list[int] = []
    need = max(*xi, yi) + 1
    for line, fields in table.rows:
        if len(fields) < need:
            raise CsvProblem(f"{len(fields)} field(s), but column {need} ({name(need - 1)}) is read", line)
        x.append([_number(fields[i], name(i), line) for i in xi])
        y.append(_number(fields[yi], name(yi), line))
        lines.append(line)
    if not x:
        raise CsvProblem("no data rows after the header")
    return Points(x, y, lines, [name(i) for i in xi], name(yi))


def _number(text: str, column: str, line: int) -> float:
    try:
        v = float(text)
    except ValueError:
        raise CsvProblem(f"{column} is not a number: {text[:40]!r}", line) from None
    if not math.isfinite(v):
        raise CsvProblem(f"{column} is not a finite number: {text[:40]!r}", line)
    return v
