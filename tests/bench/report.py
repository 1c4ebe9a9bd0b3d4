"""What every benchmark section shares: run sizes, median timing, tables printed and
kept for the result file, log-log slopes, and figures written with matplotlib.

A section is a module with ``run(size, out) -> dict`` (``size`` one of ``SIZES``, ``out``
the folder for its figures); the dict is JSON-able and holds its tables under
``"tables"`` and the file names of its figures under ``"figures"``.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

SIZES = ("smoke", "quick", "full")  # smoke: seconds, to keep the code from rotting; full: the published run


def timed(fn: Callable[[], Any], repeats: int) -> float:
    """Median wall time of ``fn`` over ``repeats`` runs, seconds."""
    times = []
    for _ in range(max(1, repeats)):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def percentile(values: Sequence[float], q: float) -> float:
    """The ``q``-th percentile (0-100) of ``values``, numpy's linear interpolation."""
    return float(np.percentile(np.asarray(values, dtype=float), q))


def loglog_slope(x: Sequence[float], y: Sequence[float]) -> float:
    """Least-squares slope of log10(y) on log10(x): the exponent of a power law y ~ x**k."""
    return float(np.polyfit(np.log10(np.asarray(x, float)), np.log10(np.asarray(y, float)), 1)[0])


class Table:
    """A titled table: printed as aligned text and kept as plain lists for the result file."""

    def __init__(self, title: str, header: Sequence[str]) -> None:
        self.title = title
        self.header = list(header)
        self.rows: list[list[Any]] = []

    def add(self, *row: Any) -> None:
        self.rows.append(list(row))

    def show(self) -> None:
        cells = [self.header] + [[_fmt(v) for v in r] for r in self.rows]
        widths = [max(len(r[i]) for r in cells) for i in range(len(self.header))]
        print(f"\n{self.title}")
        for k, r in enumerate(cells):
            print("  " + "  ".join(c.rjust(w) if k and i else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths,
                                                                                                         strict=True))))

    def to_json(self) -> dict[str, Any]:
        return {"title": self.title, "header": self.header, "rows": self.rows}


def markdown(table: dict[str, Any]) -> str:
    """A table as ``Table.to_json`` keeps it, in Markdown (numbers formatted as printed)."""
    def cell(v: Any) -> str:
        return "" if v is None else _fmt(v).replace("|", "\\|")

    lines = [f"**{table['title']}**", "", "| " + " | ".join(table["header"]) + " |",
             "|" + "|".join(" --- " for _ in table["header"]) + "|"]
    lines += ["| " + " | ".join(cell(v) for v in row) + " |" for row in table["rows"]]
    return "\n".join(lines) + "\n"


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        if v == 0 or 0.01 <= abs(v) < 1e5:
            return f"{v:,.3g}" if abs(v) < 100 else f"{v:,.0f}"
        return f"{v:.3g}"
    if isinstance(v, int):
        return f"{v:,}"
    return str(v)


def figure(title: str, xlabel: str, ylabel: str, *, log: bool = False) -> tuple[Any, Any]:
    """A new matplotlib figure and axes (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7.0, 4.5), dpi=100)
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if log:
        ax.set_xscale("log")
        ax.set_yscale("log")
    ax.grid(True, which="both", alpha=0.3)
    return fig, ax


def save(fig: Any, out: Path, name: str) -> str:
    """Write ``fig`` as ``out/name.png``; returns the file name."""
    import matplotlib.pyplot as plt

    out.mkdir(parents=True, exist_ok=True)
    fig.tight_layout()
    fig.savefig(out / f"{name}.png")
    plt.close(fig)
    return f"{name}.png"


def section_main(run: Callable[[str, Path], dict[str, Any]], doc: str | None) -> None:
    """The command line of one section, ``python -m tests.bench.<name>_bench [--size] [--out]``:
    its tables and figures, and the headline printed (no result file: that is the entry's)."""
    import argparse
    import json

    ap = argparse.ArgumentParser(description=doc, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--size", choices=SIZES, default="full")
    ap.add_argument("--out", type=Path, default=Path("docs/benchmarks"))
    args = ap.parse_args()
    t0 = time.perf_counter()
    result = run(args.size, args.out)
    print(f"\nheadline: {json.dumps(result.get('headline'), default=float)}\n({time.perf_counter() - t0:.1f} s)")
