"""``curvekeeper report CHANNEL [CAL] --out``: the command's side, against a transport that
answers as the records routes do (GET .../calibrations, GET .../calibrations/{cal}/report.pdf)
with a PDF made by render_report."""

from __future__ import annotations

import argparse
import io
from pathlib import Path

import httpx
import pytest
from curvekeeper.client import Client, ClientError
from curvekeeper.report import render_report
from curvekeeper.techcli.commands import report
from curvekeeper.techcli.common import LocalError
from pypdf import PdfReader

from tests.report.test_pdf import CHANNEL, RECORD

RECORDS = [{**RECORD, "id": 5, "at": "2026-05-02T08:00:00+00:00"}, {**RECORD, "id": 7},
           {**RECORD, "id": 6, "at": "2026-08-09T10:00:00+00:00"}]


def service(records: list[dict[str, object]], asked: list[str]) -> Client:
    def answer(request: httpx.Request) -> httpx.Response:
        asked.append(request.url.path)
        path = request.url.path
        if path == "/v1/channels/coldstore-2.t3/calibrations":
            return httpx.Response(200, json={"items": records, "next_cursor": None})
        for r in records:
            if path == f"/v1/channels/coldstore-2.t3/calibrations/{r['id']}/report.pdf":
                return httpx.Response(200, content=render_report(r, CHANNEL),
                                      headers={"content-type": "application/pdf"})
        return httpx.Response(404, json={"error": {"code": "not_found", "message": "no such record",
                                                   "details": None}})
    return Client("http://ck.test", "ck_key", transport=httpx.MockTransport(answer), max_retries=0)


def args(out: Path, cal: str | None = None) -> argparse.Namespace:
    return argparse.Namespace(channel="coldstore-2.t3", cal=cal, out=str(out))


def test_without_cal_the_latest_record_is_written(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    asked: list[str] = []
    out = tmp_path / "r.pdf"
    assert report(service(RECORDS, asked), args(out)) == 0
    assert asked[-1].endswith("/calibrations/7/report.pdf")  # 2026-11-20 is the latest
    text = PdfReader(io.BytesIO(out.read_bytes())).pages[0].extract_text()
    assert "coldstore-2.t3-7-" in text
    printed = capsys.readouterr().out
    assert "calibration 7" in printed and "Caution" in printed


def test_a_named_record_and_the_refusals(tmp_path: Path) -> None:
    asked: list[str] = []
    out = tmp_path / "r.pdf"
    assert report(service(RECORDS, asked), args(out, "5")) == 0
    assert asked == ["/v1/channels/coldstore-2.t3/calibrations/5/report.pdf"]
    with pytest.raises(LocalError, match="no calibration records"):
        report(service([], []), args(tmp_path / "none.pdf"))
    assert not (tmp_path / "none.pdf").exists()
    with pytest.raises(ClientError, match="no such record"):
        report(service(RECORDS, []), args(tmp_path / "x.pdf", "99"))
    assert not (tmp_path / "x.pdf").exists()
