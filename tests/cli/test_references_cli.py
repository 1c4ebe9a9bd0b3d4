"""``curvekeeper references ...`` and ``calibrate --reference`` against a real service on
loopback (the fixtures of ``test_techcli``)."""

from __future__ import annotations

import csv
import io
import json
import math
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from curvekeeper.cli import main
from curvekeeper.client import Client

from tests.cli.test_techcli import Terminal, api, poly, url, write_csv  # noqa: F401

DAY = datetime.now(UTC).date()


def test_create_from_flags_show_and_list(api: Client, capsys: pytest.CaptureFixture[str]) -> None:  # noqa: F811
    assert main(["references", "create", "--id", "cli.bath1", "--unit", "degC", "--expanded-uncertainty", "0.04",
                 "--coverage-factor", "2", "--certificate", "CERT-C1",
                 "--calibrated-on", (DAY - timedelta(days=30)).isoformat(),
                 "--due-on", (DAY + timedelta(days=10)).isoformat(), "--description", "check bath thermometer"]) == 0
    out = capsys.readouterr().out
    assert "created reference cli.bath1" in out and "0.02 degC" in out and "due soon" in out
    stored = api.request("GET", "/v1/references/cli.bath1")
    assert (stored["expanded_uncertainty"], stored["coverage_factor"]) == (0.04, 2.0)
    assert main(["references", "show", "cli.bath1", "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == stored
    assert main(["references", "list", "--due-state", "due_soon"]) == 0
    rows = capsys.readouterr().out.splitlines()
    assert rows[0].split()[:3] == ["reference", "state", "due"]
    assert any(r.startswith("cli.bath1") and "due soon" in r for r in rows[1:])


def test_create_from_json_and_toml_files(api: Client, tmp_path: Path,  # noqa: F811
                                         capsys: pytest.CaptureFixture[str]) -> None:
    js = tmp_path / "ref.json"
    js.write_text(json.dumps({"id": "cli.block", "unit": "degC", "distribution": "triangular", "half_width": 0.6,
                              "certificate": "CERT-C2", "calibrated_on": DAY.isoformat(),
                              "due_on": (DAY + timedelta(days=365)).isoformat()}))
    assert main(["references", "create", "--file", str(js)]) == 0
    # GUM 4.3.9: u = a / sqrt 6 = 0.6 / 2.4494897... = 0.24494897...
    u = api.request("GET", "/v1/references/cli.block")["standard_uncertainty"]
    assert math.isclose(u, 0.24494897427831781, rel_tol=1e-14)
    toml = tmp_path / "ref.toml"
    toml.write_text('id = "cli.dmm"\nunit = "degC"\nstandard_uncertainty = 0.005\ncertificate = "CERT-C3"\n'
                    f"calibrated_on = {DAY.isoformat()}\ndue_on = {(DAY + timedelta(days=200)).isoformat()}\n"
                    'note = "invented laboratory"\n')
    assert main(["references", "create", "--file", str(toml), "--note", "flag wins"]) == 0
    got = api.request("GET", "/v1/references/cli.dmm")
    assert (got["standard_uncertainty"], got["note"]) == (0.005, "flag wins")
    capsys.readouterr()
    bad = tmp_path / "bad.toml"
    bad.write_text("id = \n")
    assert main(["references", "create", "--file", str(bad)]) == 2
    assert "not valid TOML" in capsys.readouterr().err


def test_refusals_exit_1_or_2_and_store_nothing(api: Client, capsys: pytest.CaptureFixture[str]) -> None:  # noqa: F811
    base = ["references", "create", "--unit", "degC", "--certificate", "C", "--calibrated-on", DAY.isoformat()]
    assert main([*base, "--id", "cli.bad", "--expanded-uncertainty", "0", "--due-on", DAY.isoformat()]) == 1
    assert "422" in capsys.readouterr().err
    assert main([*base, "--id", "cli.bad", "--expanded-uncertainty", "0.1",
                 "--due-on", (DAY - timedelta(days=1)).isoformat()]) == 1
    assert "before calibrated_on" in capsys.readouterr().err
    assert main([*base, "--id", "Not/An/Id", "--expanded-uncertainty", "0.1", "--due-on", DAY.isoformat()]) == 2
    assert "not a reference id" in capsys.readouterr().err
    assert main(["references", "show", "cli.bad"]) == 1
    assert "not found (404" in capsys.readouterr().err
    assert main(["references", "patch", "cli.bad"]) == 2
    assert "nothing to change" in capsys.readouterr().err


def test_patch_retire_and_calibrate_against_a_reference(api: Client, tmp_path: Path,  # noqa: F811
                                                        monkeypatch: pytest.MonkeyPatch,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    api.request("POST", "/v1/references", idempotent=False, json={
        "id": "cli.late", "unit": "degC", "expanded_uncertainty": 0.2, "coverage_factor": 2.0, "certificate": "C-L",
        "calibrated_on": (DAY - timedelta(days=400)).isoformat(), "due_on": (DAY - timedelta(days=2)).isoformat()})
    api.create_channel(poly("cli.cal1"))
    points = write_csv(tmp_path / "bench.csv", ["x", "y"], [[0, 0.1], [50, 50.2], [100, 99.8]])
    assert main(["calibrate", "cli.cal1", str(points), "--reference", "cli.late", "--yes"]) == 1
    assert "409 reference_overdue" in capsys.readouterr().err
    assert api.request("GET", "/v1/channels/cli.cal1")["reference"] is None
    assert main(["calibrate", "cli.cal1", str(points), "--reference", "cli.late", "--allow-overdue-reference",
                 "--yes"]) == 0
    assert "against reference cli.late (C-L" in capsys.readouterr().out
    assert api.request("GET", "/v1/channels/cli.cal1")["reference"]["instrument"] == "cli.late"
    # a new certificate brings it back in date
    assert main(["references", "patch", "cli.late", "--certificate", "C-L2", "--calibrated-on", DAY.isoformat(),
                 "--due-on", (DAY + timedelta(days=300)).isoformat()]) == 0
    assert "changed reference cli.late: calibrated_on, certificate, due_on" in capsys.readouterr().out
    # retire asks first; without a terminal and without --yes nothing happens
    assert main(["references", "retire", "cli.late"]) == 2
    assert "--yes" in capsys.readouterr().err
    assert api.request("GET", "/v1/references/cli.late")["retired"] is False
    monkeypatch.setattr(sys, "stdin", Terminal("y\n"))
    assert main(["references", "retire", "cli.late", "--note", "broken sheath"]) == 0
    out = capsys.readouterr().out
    assert "Caution: curvekeeper supports calibration work" in out and "retired cli.late" in out
    assert api.request("GET", "/v1/references/cli.late")["retired"] is True
    monkeypatch.setattr(sys, "stdin", io.StringIO(""))
    assert main(["calibrate", "cli.cal1", str(points), "--reference", "cli.late", "--yes"]) == 1
    assert "reference_retired" in capsys.readouterr().err
    # samples that named a reference keep its id in the export
    api.request("POST", "/v1/references", idempotent=False, json={
        "id": "cli.field", "unit": "degC", "standard_uncertainty": 0.05, "certificate": "C-F",
        "calibrated_on": DAY.isoformat(), "due_on": (DAY + timedelta(days=90)).isoformat()})
    api.request("POST", "/v1/channels/cli.cal1/samples", idempotent=False,
                json={"samples": [{"x": 10.0, "y": 10.1, "reference": "cli.field"}, {"x": 20.0, "y": 20.0}]})
    assert main(["samples", "export", "cli.cal1"]) == 0
    table = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert [r["reference"] for r in table] == ["cli.field", ""]
    assert main(["references", "list", "--retired"]) == 0
    assert [r.split()[0] for r in capsys.readouterr().out.splitlines()[1:]] == ["cli.late"]
    assert main(["references", "show", "cli.late"]) == 0
    assert "retired" in capsys.readouterr().out
