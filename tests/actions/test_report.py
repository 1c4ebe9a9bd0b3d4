"""The report of a calibration record for a stored channel: the channel's answer and its
curve come from the store (read back from the PDF with pypdf)."""

from __future__ import annotations

import io
import re
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper.actions import channels, curves
from curvekeeper.actions.report import calibration_report, filename
from curvekeeper.actions.unit import Work
from curvekeeper.errors import CalibrationNotFound, ChannelNotFound
from curvekeeper.store import Store
from pypdf import PdfReader

from tests.conftest import LINEAR


@pytest.fixture
def work(tmp_path: Path, sqlite_template: Path, kernels_ready: None) -> Any:
    path = tmp_path / "store.db"
    shutil.copyfile(sqlite_template, path)
    store = Store(f"sqlite:///{path}")
    w = Work(store)
    with w.unit(write=True) as unit:
        channels.create(unit.repo, {"id": "r.c1", "description": "invented strain gauge", **LINEAR}, key_id="t")
        x = np.linspace(0, 100, 6)
        noise = [0.01, -0.02, 0.015, -0.005, 0.02, -0.01]
        first = curves.calibrate(unit, "r.c1", points=[([float(a)], 1.0 + 0.2 * float(a) + e)
                                                       for a, e in zip(x, noise, strict=True)],
                                 include_history=False, since=None, until=None, last=None, label=None, key_id="t")
        # a later calibration moves the curve: the first record's report keeps the curve it left
        curves.calibrate(unit, "r.c1", points=[([float(a)], 3.0 + 0.2 * float(a) + e) for a, e in zip(x, noise,
                                                                                                     strict=True)],
                         include_history=False, since=None, until=None, last=None, label=None, key_id="t")
    w.first = first  # type: ignore[attr-defined]
    yield w
    store.dispose()


def test_the_report_carries_the_stored_channel_and_record(work: Work) -> None:
    first = work.first  # type: ignore[attr-defined]
    with work.unit(write=False) as unit:
        pdf, name = calibration_report(unit, "r.c1", first["calibration"])
    assert name == f"calibration-r.c1-{first['calibration']}.pdf"
    text = re.sub(r"\s+", " ", " ".join(p.extract_text() for p in PdfReader(io.BytesIO(pdf)).pages))
    assert "r.c1" in text and "invented strain gauge" in text and "raw [mV], 0 to 100" in text
    assert "pressure [kPa]" in text and f"{first['record']['budget']['U']:.6g}" in text


def test_the_curve_drawn_is_the_one_the_calibration_left(work: Work, monkeypatch: pytest.MonkeyPatch) -> None:
    import curvekeeper.report as rep

    seen: dict[str, Any] = {}

    def capture(record: dict[str, Any], channel: dict[str, Any], *, curve: Any = None) -> bytes:
        seen.update(record=record, curve=curve)
        return b"%PDF"

    monkeypatch.setattr(rep, "render_report", capture)
    first = work.first  # type: ignore[attr-defined]
    with work.unit(write=False) as unit:
        calibration_report(unit, "r.c1", first["calibration"])
    xs = np.array([p["x"] for p in seen["curve"]])
    ys = np.array([p["y"] for p in seen["curve"]])
    # the first fit's line (numpy.polyfit on its points), not the second's 2 kPa higher one
    x = np.linspace(0, 100, 6)
    line = np.polyfit(x, 1.0 + 0.2 * x + np.array([0.01, -0.02, 0.015, -0.005, 0.02, -0.01]), 1)
    np.testing.assert_allclose(ys, np.polyval(line, xs), atol=1e-9)
    assert seen["record"]["id"] == first["calibration"]


def test_an_unknown_channel_or_record_has_no_report(work: Work) -> None:
    with work.unit(write=False) as unit, pytest.raises(ChannelNotFound):
        calibration_report(unit, "r.nope", 1)
    with work.unit(write=False) as unit, pytest.raises(CalibrationNotFound):
        calibration_report(unit, "r.c1", 999)


def test_the_file_name_is_safe() -> None:
    assert filename("a.b/c", {"id": 7}) == "calibration-a.b_c-7.pdf"
