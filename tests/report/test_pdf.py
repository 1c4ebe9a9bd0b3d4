"""The calibration report (service/curvekeeper/report/) rendered from an invented record:
parsed back with pypdf (its text holds the record's numbers, the report id and "page x of
y" on every page) and drawn with poppler's pdftoppm (one PNG per page)."""

from __future__ import annotations

import io
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
from curvekeeper.report import render_report
from curvekeeper.report.content import CAUTION, ONLY_THE_ITEM, report_id
from pypdf import PdfReader

PDFTOPPM = "/usr/bin/pdftoppm"


def point(x: float, ref: float, ind: float, tol: float, verdict: str) -> dict[str, Any]:
    return {"x": x, "reference_value": ref, "indicated": ind, "error": round(ind - ref, 4), "tolerance": tol,
            "verdict": verdict}


#: an invented cold-store probe's record: a platinum resistance thermometer read in ohm,
#: calibrated in a stirred bath against an invented reference thermometer
RECORD: dict[str, Any] = {
    "id": 7,
    "at": "2026-11-20T09:41:00+00:00",
    "by": "bench technician 2 (key k-17)",
    "decision_rule": "guarded",
    "verdict": "conditional",
    "supersedes": 5,
    "as_found": [point([84.27], -40.02, -39.71, 0.3, "fail"), point([92.16], -20.01, -19.83, 0.3, "conditional"),
                 point([100.0], 0.004, 0.131, 0.3, "pass"), point([107.79], 20.03, 20.212, 0.3, "conditional"),
                 point([115.54], 40.05, 40.298, 0.3, "conditional")],
    "as_left": [point([84.27], -40.02, -40.047, 0.3, "pass"), point([92.16], -20.01, -19.988, 0.3, "pass"),
                point([100.0], 0.004, 0.019, 0.3, "pass"), point([107.79], 20.03, 20.011, 0.3, "pass"),
                point([115.54], 40.05, 40.064, 0.3, "pass")],
    "fit": {"basis": {"kind": "poly", "degree": 2}, "coefficients": [-255.87, 2.4112, 0.000963],
            "coefficient_sd": [0.41, 0.0083, 4.1e-05], "residual_sd": 0.0241, "dof": 2},
    "budget": {"rows": [
        {"source": "curve and scatter", "type": "A", "distribution": "t", "u": 0.0283, "sensitivity": 1.0,
         "contribution": 0.0283, "dof": 2},
        {"source": "reference", "type": "B", "distribution": "normal", "u": 0.0125, "sensitivity": 1.0,
         "contribution": 0.0125, "dof": None},
        {"source": "resolution of resistance", "type": "B", "distribution": "rectangular", "u": 0.00289,
         "sensitivity": 2.597, "contribution": 0.0075, "dof": None}],
        "u_combined": 0.0318, "dof_effective": 3.2, "k": 3.18, "U": 0.1011},
    "conditions": {"ambient temperature": "21.4 degC", "bath": "stirred ethanol bath, 30 min per point",
                   "note": "probe immersed 180 mm; cable strain relief replaced before as-found"},
    "references": [{"id": "ref-prt-07", "description": "working-standard platinum thermometer",
                    "certificate": "CAL-2026-0415", "calibrated_on": "2026-04-15", "due_on": "2027-04-15",
                    "expanded_uncertainty": 0.025, "coverage_factor": 2.0, "unit": "degC"}],
    "interval_suggestion": {"current_days": 365, "suggested_days": 219, "method": "staircase: as found outside "
                            "tolerance, interval x 0.6 (bounded 90 to 730 days)"},
}
CHANNEL: dict[str, Any] = {
    "id": "coldstore-2.t3", "sensor": "Pt100 probe in chamber 2, shelf 3 (serial PX-3381)",
    "inputs": [{"name": "resistance", "unit": "ohm", "min": 80.0, "max": 120.0}],
    "output": {"name": "temperature", "unit": "°C", "transform": "none"},
    "basis": {"kind": "poly", "degree": 2},
    "forecast": {"leaves_tolerance_on": "2027-06-02T00:00:00+00:00", "low": "2027-04-20T00:00:00+00:00",
                 "high": "2027-08-01T00:00:00+00:00", "rate": 0.00041, "method": "weighted least-squares line",
                 "n_points": 40, "not_within_days": None},
}


@pytest.fixture(scope="module")
def pdf(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("report") / "report.pdf"
    path.write_bytes(render_report(RECORD, CHANNEL))
    return path


def flat(text: str) -> str:
    return re.sub(r"\s+", " ", text)


def test_the_report_parses_and_holds_the_records_numbers(pdf: Path) -> None:
    reader = PdfReader(pdf)
    pages = [flat(p.extract_text()) for p in reader.pages]
    text = " ".join(pages)
    for p in RECORD["as_found"] + RECORD["as_left"]:
        for key in ("reference_value", "indicated", "error"):
            assert f"{p[key]:.6g}" in text, (key, p[key])
    for word in ("fail", "conditional", "pass", "CONDITIONAL"):
        assert word in text
    budget = RECORD["budget"]
    for row in budget["rows"]:
        assert row["source"] in text and f"{row['u']:.6g}" in text and f"{row['contribution']:.6g}" in text
    for key in ("u_combined", "dof_effective", "k", "U"):
        assert f"{budget[key]:.6g}" in text
    for v in RECORD["fit"]["coefficients"] + RECORD["fit"]["coefficient_sd"]:
        assert f"{v:.6g}" in text
    ref = RECORD["references"][0]
    for v in (ref["id"], ref["certificate"], ref["calibrated_on"], ref["due_on"], "0.025"):
        assert v in text
    for v in (CHANNEL["id"], "PX-3381", "resistance [ohm]", "temperature [°C]", "2026-11-20T09:41:00",
              "bench technician 2", "guard band w = U", "21.4 degC", "cable strain relief", "219", "2027-06-02"):
        assert v in text, v
    assert ONLY_THE_ITEM in text and CAUTION in text
    assert "supersedes" in text.lower() and " 5 " in text


def test_every_page_says_which_report_and_page_x_of_y(pdf: Path) -> None:
    reader = PdfReader(pdf)
    n = len(reader.pages)
    assert n >= 2  # the tables, the two figures and the budget do not fit on one A4 page
    ids = set()
    for i, page in enumerate(reader.pages, start=1):
        text = flat(page.extract_text())
        assert f"page {i} of {n}" in text
        found = re.search(r"report (CKR-\S+)", text)
        assert found, text[:200]
        ids.add(found.group(1))
    assert len(ids) == 1 and ids.pop().startswith("CKR-coldstore-2.t3-7-")


def test_a_corrected_record_gets_another_report_id(pdf: Path) -> None:
    printed = re.search(r"report (CKR-\S+)", flat(PdfReader(pdf).pages[0].extract_text()))
    assert printed and printed.group(1) == report_id(RECORD, CHANNEL)
    assert report_id({**RECORD, "id": 8, "supersedes": 7}, CHANNEL) != report_id(RECORD, CHANNEL)
    assert report_id({**RECORD, "by": "someone else"}, CHANNEL) != report_id(RECORD, CHANNEL)


@pytest.mark.skipif(not Path(PDFTOPPM).exists() or shutil.which("pdftoppm") is None,
                    reason="pdftoppm is missing: install Debian's poppler-utils (.ci/run does) to render the pages")
def test_the_pages_render_with_pdftoppm(pdf: Path, tmp_path: Path) -> None:
    n = len(PdfReader(pdf).pages)
    subprocess.run([PDFTOPPM, "-r", "50", "-png", str(pdf), str(tmp_path / "page")], check=True,
                   capture_output=True, timeout=120)
    pngs = sorted(tmp_path.glob("page-*.png"))
    assert len(pngs) == n
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and p.stat().st_size > 2000 for p in pngs)


def test_a_two_input_channel_and_a_sparse_record_render() -> None:
    """x as [resistance, lead temperature]: the plots use the first input; parts the record
    lacks print as '-' or '(none)', never fail."""
    rows = [point([100.0 + i, 20.0], float(i), float(i) + 0.01, 0.3, "pass") for i in range(4)]
    record = {"id": "c-1", "as_found": rows, "as_left": rows, "verdict": "pass", "decision_rule": "simple"}
    channel = {"id": "two.c1", "inputs": [{"name": "r", "unit": "ohm", "min": 90, "max": 120},
                                          {"name": "lead", "unit": "degC", "min": 0, "max": 40}],
               "output": {"name": "t", "unit": "degC"}, "forecast": None}
    reader = PdfReader(io.BytesIO(render_report(record, channel)))
    text = flat(" ".join(p.extract_text() for p in reader.pages))
    assert "101, 20" in text and "|error| <= tolerance" in text and "(none)" in text
    assert f"page 1 of {len(reader.pages)}" in text


def test_a_calibration_against_an_overdue_reference_says_so() -> None:
    """The record's reference carries ``overdue`` (its due date lay before the calibration's
    day) when the person calibrated with ``allow_overdue_reference``: the report names it."""
    refs = [{**RECORD["references"][0], "due_on": "2026-10-01", "overdue": True, "allow_overdue_reference": True}]
    text = flat(" ".join(p.extract_text() for p in PdfReader(io.BytesIO(render_report(
        {**RECORD, "references": refs}, CHANNEL))).pages))
    assert "ref-prt-07) was past its due date" in text and "allow_overdue_reference" in text
    plain = flat(" ".join(p.extract_text() for p in PdfReader(io.BytesIO(render_report(RECORD, CHANNEL))).pages))
    assert "past its due date" not in plain
