"""``curvekeeper samples export`` writes formula-like sources as text, numbers as numbers."""

from __future__ import annotations

import csv
from pathlib import Path

from curvekeeper.cli import main
from curvekeeper.client import Client

from tests.cli.test_techcli import api, poly, url  # noqa: F401  (the module's server fixtures)

SOURCES = ['=HYPERLINK("http://example.invalid/","open")', "+cmd|' /C calc'!A0", "-1+1", "@SUM(1)"]


def test_export_quotes_formula_like_sources(api: Client, tmp_path: Path) -> None:  # noqa: F811
    cid = "cells.c1"
    api.create_channel(poly(cid))
    for i, source in enumerate(SOURCES):
        api.request("POST", f"/v1/channels/{cid}/samples", json=
                    {"source": source, "samples": [{"x": float(i), "y": -2.5 - i, "seq": 1}]})
    out = tmp_path / "export.csv"
    assert main(["samples", "export", cid, "--out", str(out)]) == 0
    with out.open(newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["source"] for r in rows] == ["'" + s for s in SOURCES]
    assert [float(r["y"]) for r in rows] == [-2.5 - i for i in range(len(SOURCES))]
