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
from curvekeeper.errors import ChannelNotFound
from curvekeeper.store import Store
from pypdf import PdfReader

from tests.conftest import LINEAR
from tests.report.test_pdf import RECORD


@pytest.fixture
def work(tmp_path: Path, sqlite_template: Path, kernels_ready: None) -> Any:
    path = tmp_path / "store.db"
    shutil.copyfile(sqlite_template, path)
    store = Store(f"sqlite:///{path}")
    w = Work(store)
    with w.unit(write=True) as unit:
        channels.create(unit.repo, {"id": "r.c1", "description": "invented strain gauge", **LINEAR}, key_id="t")
        x = np.linspace(0, 100, 6)
        curves.calibrate(unit, "r.c1", points=[([float(a)], 1.0 + 0.2 * float(a)) for a in x],
                         include_history=False, since=None, until=None, last=None, label=None, key_id="t")
    yield w
    store.dispose()


def test_the_report_carries_the_stored_channel(work: Work) -> None:
    with work.unit(write=False) as unit:
        pdf = calibration_report(unit, "r.c1", RECORD)
    text = re.sub(r"\s+", " ", " ".join(p.extract_text() for p in PdfReader(io.BytesIO(pdf)).pages))
    assert "r.c1" in text and "invented strain gauge" in text and "raw [mV], 0 to 100" in text
    assert "pressure [kPa]" in text and f"{RECORD['budget']['U']:.6g}" in text


def test_an_unknown_channel_has_no_report(work: Work) -> None:
    with work.unit(write=False) as unit, pytest.raises(ChannelNotFound):
        calibration_report(unit, "r.nope", RECORD)


def test_the_file_name_is_safe() -> None:
    assert filename("a.b/c", {"id": 7}) == "calibration-a.b_c-7.pdf"
