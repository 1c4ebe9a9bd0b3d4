"""Convert NIST StRD linear-regression ``.dat`` files to small JSON files of numbers.

Usage::

    python tests/data/convert_nist.py [SOURCE_DIR]

SOURCE_DIR defaults to ``../shared/reference/nist-strd`` relative to the repository
root. One file ``tests/data/nist/<name>.json`` is written per dataset with::

    {"name", "n_inputs", "intercept", "degree", "x": [[x1, ...], ...], "y": [...],
     "certified": {"estimates": [...], "sd": [...], "residual_sd": ..., "r_squared": ...}}

Each file's header line ``Certified Values (lines a to b)`` and ``Data (lines a to b)``
(1-based, inclusive) say where the numbers are; in the data block the first column
is y and the others are the inputs. Every number is ``float()`` of its decimal text.
"""

from __future__ import annotations

import json
import re
import sys
from pathlib import Path
from typing import Any

REPO_ROOT = Path(__file__).resolve().parents[2]
DEFAULT_SOURCE = REPO_ROOT / ".." / "shared" / "reference" / "nist-strd"
OUT_DIR = Path(__file__).resolve().parent / "nist"

# Polynomial degree of each model (Longley: six inputs, degree 1 in each).
DEGREES = {
    "Norris": 1,
    "NoInt1": 1,
    "NoInt2": 1,
    "Longley": 1,
    "Pontius": 2,
    "Filip": 10,
    "Wampler1": 5,
    "Wampler2": 5,
    "Wampler3": 5,
    "Wampler4": 5,
    "Wampler5": 5,
}

BLOCK = re.compile(r"^\s*(Certified Values|Data)\s*\(lines\s+(\d+)\s+to\s+(\d+)\)\s*$")
PARAM = re.compile(r"^\s*B(\d+)\s+(\S+)\s+(\S+)\s*$")
RESIDUAL_SD = re.compile(r"^\s*Standard Deviation\s+(\S+)\s*$")
R_SQUARED = re.compile(r"^\s*R-Squared\s+(\S+)\s*$")


def _blocks(lines: list[str]) -> dict[str, tuple[int, int]]:
    """Line ranges (0-based start, exclusive end) of the certified values and the data."""
    found: dict[str, tuple[int, int]] = {}
    for line in lines[:20]:
        m = BLOCK.match(line)
        if m:
            found[m.group(1)] = (int(m.group(2)) - 1, int(m.group(3)))
    if set(found) != {"Certified Values", "Data"}:
        raise ValueError(f"header line ranges not found (got {sorted(found)})")
    return found


def _certified(lines: list[str]) -> tuple[dict[str, Any], list[int]]:
    params: list[tuple[int, float, float]] = []
    residual_sd = r_squared = None
    for line in lines:
        if (m := PARAM.match(line)) is not None:
            params.append((int(m.group(1)), float(m.group(2)), float(m.group(3))))
        elif (m := RESIDUAL_SD.match(line)) is not None:
            residual_sd = float(m.group(1))
        elif (m := R_SQUARED.match(line)) is not None:
            r_squared = float(m.group(1))
    if not params or residual_sd is None or r_squared is None:
        raise ValueError("certified block incomplete")
    indices = [p[0] for p in params]
    if indices != list(range(indices[0], indices[0] + len(indices))):
        raise ValueError(f"parameters not in order: {indices}")
    cert = {
        "estimates": [p[1] for p in params],
        "sd": [p[2] for p in params],
        "residual_sd": residual_sd,
        "r_squared": r_squared,
    }
    return cert, indices


def _data(lines: list[str]) -> tuple[list[list[float]], list[float]]:
    rows = [[float(v) for v in line.split()] for line in lines if line.strip()]
    width = {len(r) for r in rows}
    if len(width) != 1 or min(width) < 2:
        raise ValueError(f"data rows of unequal or too small width: {sorted(width)}")
    return [r[1:] for r in rows], [r[0] for r in rows]


def convert(path: Path) -> dict[str, Any]:
    """The JSON-ready record of one ``.dat`` file."""
    name = path.stem
    lines = path.read_text(encoding="ascii").splitlines()
    blocks = _blocks(lines)
    c0, c1 = blocks["Certified Values"]
    d0, d1 = blocks["Data"]
    cert, indices = _certified(lines[c0:c1])
    x, y = _data(lines[d0:d1])
    intercept = indices[0] == 0
    return {
        "name": name,
        "n_inputs": len(x[0]),
        "intercept": intercept,
        "degree": DEGREES[name],
        "x": x,
        "y": y,
        "certified": cert,
    }


def _dumps(record: dict[str, Any]) -> str:
    """JSON with one key per line and one data row per line (readable diffs)."""
    parts = []
    for key, value in record.items():
        if key == "x":
            rows = ",\n  ".join(json.dumps(r) for r in value)
            text = f"[\n  {rows}\n ]"
        else:
            text = json.dumps(value)
        parts.append(f" {json.dumps(key)}: {text}")
    return "{\n" + ",\n".join(parts) + "\n}\n"


def main(argv: list[str]) -> int:
    source = Path(argv[1]) if len(argv) > 1 else DEFAULT_SOURCE
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    for name in DEGREES:
        record = convert(source / f"{name}.dat")
        out = OUT_DIR / f"{name}.json"
        out.write_text(_dumps(record), encoding="ascii")
        print(f"{out.relative_to(REPO_ROOT)}: n={len(record['y'])}, "
              f"inputs={record['n_inputs']}, parameters={len(record['certified']['estimates'])}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
