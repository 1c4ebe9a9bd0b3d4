"""The CSV export opens in a spreadsheet as data: a stored ``source`` that looks like a
formula comes out as text, and numbers (negative ones too) stay numbers."""

from __future__ import annotations

import csv
import io
from typing import Any

from fastapi.testclient import TestClient

# (a source with a tab or a line break is refused at the door: tests/api/test_inputs.py;
# the writer's own handling of those is in tests/test_csvcells.py)
SOURCES = ['=HYPERLINK("http://example.invalid/","open")', "+cmd|' /C calc'!A0", "@SUM(1+1)", "-1+1"]


def test_csv_export_quotes_formula_like_text(client: TestClient, keys: dict[str, dict[str, str]],
                                             make_channel: Any) -> None:
    make_channel("site-a.p1")
    for i, source in enumerate(SOURCES):
        body = {"source": source, "samples": [{"x": float(i), "y": -1.5 - i, "seq": 1}]}
        r = client.post("/v1/channels/site-a.p1/samples", json=body, headers=keys["device"])
        assert r.status_code == 200, r.text
    r = client.get("/v1/channels/site-a.p1/samples?format=csv", headers=keys["technician"])
    assert r.status_code == 200, r.text
    rows = list(csv.DictReader(io.StringIO(r.text)))
    assert [row["source"] for row in rows] == ["'" + s for s in SOURCES]
    assert [float(row["y"]) for row in rows] == [-1.5 - i for i in range(len(SOURCES))]
    assert all(not row["y"].startswith("'") for row in rows)
