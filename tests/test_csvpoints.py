"""The one CSV reader of bench points (the calibrate route, so the page and the command
line, and the command line's samples load)."""

from __future__ import annotations

import pytest
from curvekeeper.csvpoints import CsvProblem, read_points, read_table


def test_comments_delimiters_and_the_header_are_found() -> None:
    t = read_table("\ufeff# bath 3\n\n  # operator: A. Example\ncurrent_mA;pressure_bar\n4;0\n20;10\n")
    assert t.header == ["current_mA", "pressure_bar"] and t.rows == [(5, ["4", "0"]), (6, ["20", "10"])]
    assert read_table("1\t2\n3\t4").header is None  # numbers only: no header
    assert read_table("a,b;c\n").header == ["a", "b;c"]  # the most frequent separator of the first row
    p = read_points("x,y\n1,2\n3,4\n", 1)
    assert (p.x, p.y, p.lines, p.x_columns, p.y_column) == ([[1.0], [3.0]], [2.0, 4.0], [2, 3], ["x"], "y")


def test_default_columns() -> None:
    assert read_points("y,x\n1,2\n", 1).x == [[2.0]]  # x and y by name, in any order
    assert read_points("t,x2,y,x1\n0,1,2,3\n", 2).x == [[3.0, 1.0]]  # x1 ... xn in input order
    assert read_points("current_mA,pressure_bar,note\n4,0,ok\n", 1).y == [0.0]  # the first columns
    assert read_points("ref,y,raw\n5,6,7\n", 1).x == [[5.0]]  # y by name, x the first other column
    assert read_points("1,2\n3,4\n", 1).x_columns == ["column 1"]


def test_chosen_columns() -> None:
    text = "Pressure_Bar,step,Current_mA\n10,1,20\n"
    p = read_points(text, 1, ["current_ma"], "PRESSURE_BAR")  # names without regard to case
    assert (p.x, p.y, p.x_columns, p.y_column) == ([[20.0]], [10.0], ["Current_mA"], "Pressure_Bar")
    assert read_points(text, 1, [3], 1).x == [[20.0]]  # positions from 1
    assert read_points(text, 1, ["3"]).y == [10.0]  # y: the first column not taken as an input
    assert read_points(text, 1, None, "1").x == [[1.0]]  # x: the first columns besides y


@pytest.mark.parametrize(("text", "args", "message"), [
    ("", (), "no rows"),
    ("# nothing\n", (), "no rows"),
    ("x,y\n", (), "no data rows after the header"),
    ("x,y\n1,2\n2,warm\n", (), "line 3: y is not a number: 'warm'"),
    ("x,y\n1,nan\n", (), "line 2: y is not a finite number"),
    ("x,y\n1\n", (), "line 2: 1 field(s), but column 2 (y) is read"),
    ("x1,x2,y\n1,2,3\n", (), "names 2 input column(s) (x1, x2), but the channel has 1"),
    ("a,b\n1,2\n", (["c"], None), "x column 'c' is not in the header (its columns: a, b)"),
    ("1,2\n", (["a"], None), "x column 'a' is not in the header (its columns: none: the first row holds numbers)"),
    ("a,b\n1,2\n", ([3], None), "x column 3 does not exist: the rows have 2 column(s)"),
    ("a,b\n1,2\n", (["a"], "A"), "a column is used twice"),
    ("a,b\n1,2\n", (["a", "b"], None), "2 x column(s) given, but the channel has 1"),
])
def test_problems_name_the_line_and_column(text: str, args: tuple[object, ...], message: str) -> None:
    with pytest.raises(CsvProblem) as exc:
        read_points(text, 1, *args)  # type: ignore[arg-type]
    assert message in exc.value.message
