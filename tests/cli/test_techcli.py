"""The technician's command line against a real service on loopback."""

from __future__ import annotations

import csv
import io
import json
import socket
import sys
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper import techcli
from curvekeeper.cli import main
from curvekeeper.client import Client
from curvekeeper.config import Settings
from curvekeeper.demo.run import start_server

SECRET = "ck_techcli-test-admin-0123456789"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def poly(cid: str, degree: int = 1, **extra: Any) -> dict[str, Any]:
    return {"id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
            "output": {"name": "temperature", "unit": "degC"}, "basis": {"kind": "poly", "degree": degree},
            **extra}


@pytest.fixture(scope="module")
def url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    port = free_port()
    db = tmp_path_factory.mktemp("techcli") / "s.db"
    server, thread = start_server(Settings(database_url=f"sqlite:///{db}", port=port, admin_key=SECRET))
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=10)


@pytest.fixture
def api(url: str, monkeypatch: pytest.MonkeyPatch) -> Iterator[Client]:
    monkeypatch.setenv("CURVEKEEPER_KEY", SECRET)
    monkeypatch.setenv("CURVEKEEPER_URL", url)
    monkeypatch.setattr(sys, "stdin", io.StringIO(""))  # no terminal unless a test gives one
    with Client(url, SECRET) as c:
        yield c


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def write_csv(path: Path, header: list[str], rows: list[list[Any]]) -> Path:
    with path.open("w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)
    return path


def all_samples(c: Client, cid: str) -> list[dict[str, Any]]:
    items: list[dict[str, Any]] = []
    cursor = None
    while True:
        page = c.request("GET", f"/v1/channels/{cid}/samples?limit=1000" + (f"&cursor={cursor}" if cursor else ""))
        items += page["items"]
        cursor = page["next_cursor"]
        if not cursor:
            return items


# errors ---------------------------------------------------------------------------------
def test_errors_have_one_line_and_their_exit_code(api: Client, url: str, monkeypatch: pytest.MonkeyPatch,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.delenv("CURVEKEEPER_KEY")
    assert main(["channels", "list"]) == 2
    assert "set CURVEKEEPER_KEY" in capsys.readouterr().err

    monkeypatch.setenv("CURVEKEEPER_KEY", "ck_wrong-key-0123456789")
    assert main(["channels", "list"]) == 1
    err = capsys.readouterr().err
    assert "401" in err and "CURVEKEEPER_KEY" in err and len(err.strip().splitlines()) == 1

    monkeypatch.setenv("CURVEKEEPER_KEY", SECRET)
    assert main(["channels", "show", "no.such.channel"]) == 1
    err = capsys.readouterr().err
    assert "not found (404" in err and "no.such.channel" in err
    assert main(["channels", "show", "../keys"]) == 2  # never sent: not a channel id
    assert "not a channel id" in capsys.readouterr().err

    assert main(["channels", "list", "--url", f"http://127.0.0.1:{free_port()}", "--retries", "1"]) == 3
    err = capsys.readouterr().err
    assert err.startswith("curvekeeper: cannot reach the service at http://127.0.0.1:") and len(err.splitlines()) == 1

    with pytest.raises(SystemExit) as exc:
        main(["channels", "list", "--state", "bogus"])
    assert exc.value.code == 2


def test_forbidden_for_a_device_key(api: Client, monkeypatch: pytest.MonkeyPatch,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    key = api.request("POST", "/v1/keys", json={"role": "device", "prefixes": ["dev."]}, idempotent=False)
    monkeypatch.setenv("CURVEKEEPER_KEY", key["secret"])
    assert main(["channels", "list"]) == 1
    assert "not allowed with this key (403" in capsys.readouterr().err


# channels -------------------------------------------------------------------------------
def test_channels_list_follows_every_page_and_show(api: Client, monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    for i in range(5):
        api.create_channel(poly(f"list.c{i}"))
    api.post_samples("list.c3", [{"x": 10.0, "y": 10.2, "t": "2026-12-01T10:00:00Z"}])
    monkeypatch.setattr(techcli.common, "PAGE", 2)
    assert main(["channels", "list", "--prefix", "list."]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].split() == ["id", "drift", "tolerance", "samples", "rmse", "last", "sample", "(UTC)", "calibration",
                              "due"]
    assert [line.split()[0] for line in out[1:]] == [f"list.c{i}" for i in range(5)]
    row = next(line for line in out if line.startswith("list.c3"))
    assert row.split()[1:4] == ["ok", "-", "1"] and "degC" in row and "2026-12-01" in row

    assert main(["channels", "list", "--prefix", "list.", "--json"]) == 0
    items = json.loads(capsys.readouterr().out)
    assert [c["id"] for c in items] == [f"list.c{i}" for i in range(5)]
    assert main(["channels", "list", "--prefix", "list.", "--state", "alarm"]) == 0
    assert capsys.readouterr().out.splitlines()[1:] == []
    # calibrated 400 days ago with the default 365-day interval: overdue; never calibrated: no due date
    at = (datetime.now(UTC) - timedelta(days=400)).isoformat()
    api.request("POST", "/v1/channels/list.c1/calibrate", json={"points": [{"x": 0, "y": 0}, {"x": 50, "y": 5},
                                                                          {"x": 100, "y": 10}], "at": at})
    assert main(["channels", "list", "--prefix", "list.", "--due", "overdue"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert [line.split()[0] for line in out[1:]] == ["list.c1"] and out[1].endswith("overdue")
    assert main(["channels", "list", "--prefix", "list.", "--due", "due_soon"]) == 0
    assert capsys.readouterr().out.splitlines()[1:] == []
    assert main(["channels", "list", "--prefix", "list.c2"]) == 0
    assert capsys.readouterr().out.splitlines()[1].endswith(" -")
    # silent since its creation for far more than 3 x 1 microsecond: stale
    api.request("PATCH", "/v1/channels/list.c4", json={"expected_interval": 1e-6})
    assert main(["channels", "list", "--prefix", "list.", "--state", "stale"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert [line.split()[0] for line in out[1:]] == ["list.c4"] and out[1].split()[1] == "ok,stale"

    assert main(["channels", "show", "list.c3"]) == 0
    out = capsys.readouterr().out
    assert "input raw" in out and "[0, 100]" in out and "temperature [degC]" in out and "1 (0 held back)" in out
    assert "never calibrated (decision rule simple)" in out and "service          in service" in out
    assert "reporting        not watched" in out
    assert main(["channels", "show", "list.c4"]) == 0
    assert "reporting        stale since" in capsys.readouterr().out
    assert main(["channels", "show", "list.c1"]) == 0
    shown = capsys.readouterr().out
    due = api.get_channel("list.c1")["due_on"]
    assert f"calibration due  {due} overdue (every 365 days" in shown
    assert main(["channels", "show", "list.c3", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["n_samples"] == 1


# calibrate, curve, snapshots, rollback --------------------------------------------------
def test_calibrate_curve_snapshots_and_rollback(api: Client, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    cid = "cal.c1"
    api.create_channel(poly(cid, degree=2))
    bench = write_csv(tmp_path / "bench.csv", ["x", "y"], [[x, 1.0 + 0.5 * x] for x in (0, 20, 40, 60, 80, 100)])
    # no terminal and no --yes: refused, nothing sent
    assert main(["calibrate", cid, str(bench)]) == 2
    cap = capsys.readouterr()
    assert "--yes" in cap.err and api.get_channel(cid)["version"] == 0
    assert "does not replace traceable, accredited calibration" in cap.out  # the caution, before acting
    # a terminal, answered no: the fit report was shown first (a dry run), nothing changed
    monkeypatch.setattr(sys, "stdin", Terminal("n\n"))
    assert main(["calibrate", cid, str(bench)]) == 2
    cap = capsys.readouterr()
    assert "not confirmed" in cap.err and api.get_channel(cid)["version"] == 0
    assert "a preview: nothing has changed yet" in cap.out and "rms residual" in cap.out
    assert cap.out.index("R-squared") < cap.out.index("does not replace traceable")
    # a terminal, answered yes
    monkeypatch.setattr(sys, "stdin", Terminal("y\n"))
    assert main(["calibrate", cid, str(bench), "--label", "bench 1"]) == 0
    cap = capsys.readouterr()
    assert "Calibrate cal.c1 now? [y/N]" in cap.err
    out = cap.out
    assert "calibrated cal.c1: 6 points" in out and "R-squared             1\n" in out and "s.d." in out
    assert "coefficients of y [degC]" in out and "raw^2" in out
    first = api.get_channel(cid)["version"]

    shifted = write_csv(tmp_path / "shifted.csv", ["x", "y"], [[x, 1.5 + 0.5 * x] for x in (0, 20, 40, 60, 80, 100)])
    # a dry run shows the as-found table (the current curve 0.5 degC low at each point) and applies nothing
    api.request("PATCH", f"/v1/channels/{cid}", json={"drift": {"tolerance": 0.4}})
    patched = api.get_channel(cid)["version"]
    assert main(["calibrate", cid, str(shifted), "--dry-run"]) == 0
    out = capsys.readouterr().out
    rows = out[out.index("as found"):].splitlines()
    assert rows[1].split() == ["x", "reference", "indicated", "error", "tolerance", "verdict"]
    assert [r.split()[3:] for r in rows[2:8]] == [["-0.5", "0.4", "fail"]] * 6
    assert "verdict as found: fail, as left: pass" in out and "dry run: nothing applied" in out
    assert "does not replace traceable" in out and api.get_channel(cid)["version"] == patched
    assert main(["calibrate", cid, str(shifted), "--yes", "--reason", "drifted 0.5 degC"]) == 0
    out = capsys.readouterr().out
    assert "largest curve change  0.5 degC" in out and "as left pass" in out
    cals = api.request("GET", f"/v1/channels/{cid}/events?kind=calibration")["items"]
    assert cals[-1]["details"]["reason"] == "drifted 0.5 degC"
    undo = int(out.rsplit("rollback cal.c1 ", 1)[1].split()[0])

    assert main(["curve", cid, "--points", "3"]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].split() == ["raw", "[mV]", "y", "[degC]", "u", "[degC]", "U", "[degC]", "k"]
    assert [float(v) for v in lines[2].split()[:2]] == pytest.approx([50.0, 26.5])
    assert "power series" in out
    table = lines[lines.index(next(ln for ln in lines if ln.startswith("coefficients"))) + 2:]
    coef = {ln.split()[0]: float(ln.split()[1]) for ln in table}
    assert coef["1"] == pytest.approx(1.5) and coef["raw"] == pytest.approx(0.5) and abs(coef["raw^2"]) < 1e-9
    assert main(["curve", cid, "--json", "--points", "2"]) == 0
    assert len(json.loads(capsys.readouterr().out)["points"]) == 2

    assert main(["snapshots", "take", cid, "--label", "after second"]) == 0
    taken = int(capsys.readouterr().out.split()[1])
    assert main(["snapshots", "list", cid]) == 0
    out = capsys.readouterr().out
    assert "after second" in out and "before-calibrate" in out and str(taken) in out
    assert main(["snapshots", "diff", cid, str(undo), str(taken)]) == 0
    out = capsys.readouterr().out
    assert f"snapshot {undo} vs snapshot {taken}: largest curve difference 0.5 degC" in out
    assert main(["snapshots", "diff", cid, str(undo), "9999"]) == 1
    assert "404" in capsys.readouterr().err

    # rollback: no terminal, no --yes: refused; then confirmed on a terminal
    monkeypatch.setattr(sys, "stdin", io.StringIO("y\n"))
    assert main(["rollback", cid, str(undo)]) == 2
    cap = capsys.readouterr()
    assert "largest curve difference 0.5 degC" in cap.out and "--yes" in cap.err
    assert api.predict(cid, [50.0])["y"][0] == pytest.approx(26.5)
    monkeypatch.setattr(sys, "stdin", Terminal("yes\n"))
    assert main(["rollback", cid, str(undo)]) == 0
    out = capsys.readouterr().out
    assert f"rolled back to snapshot {undo}" in out and "does not replace traceable, accredited" in out
    assert "stays the last calibration's" in out and "reference kept" in out
    assert api.predict(cid, [50.0])["y"][0] == pytest.approx(26.0)
    assert api.get_channel(cid)["version"] > first
    # --yes needs no terminal
    monkeypatch.setattr(sys, "stdin", io.StringIO(""))
    assert main(["rollback", cid, str(taken), "--yes", "--set-reference", "--reason", "bench check passed"]) == 0
    assert api.predict(cid, [50.0])["y"][0] == pytest.approx(26.5)
    out = capsys.readouterr().out
    assert "becomes the restored one" in out and "reference restored_snapshot" in out
    assert api.get_channel(cid)["drift"]["max_curve_change"] == 0.0  # measured against the restored curve
    rollbacks = api.request("GET", f"/v1/channels/{cid}/events?kind=rollback")["items"]
    assert rollbacks[-1]["details"]["reason"] == "bench check passed"


def test_diff_and_rollback_show_the_services_figure(api: Client, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    """The command line prints the service's largest difference and where it is, computed on
    the model's standard grid; it computes none itself."""
    cid = "cal.diff"
    api.create_channel(poly(cid, degree=2))
    xs = [0, 20, 40, 60, 80, 100]
    line = [[x, 1.0 + 0.5 * x] for x in xs]
    # the second curve differs by 1 - 0.0002 (x - 100/3)^2: largest at x = 100/3, between grid points
    bowed = [[x, y + 1.0 - 0.0002 * (x - 100 / 3) ** 2] for x, y in line]
    assert main(["calibrate", cid, str(write_csv(tmp_path / "a.csv", ["x", "y"], line)), "--yes"]) == 0
    assert main(["calibrate", cid, str(write_csv(tmp_path / "b.csv", ["x", "y"], bowed)), "--yes"]) == 0
    first = int(capsys.readouterr().out.rsplit("rollback cal.diff ", 1)[1].split()[0])  # the line, kept before
    assert main(["snapshots", "take", cid]) == 0
    second = int(capsys.readouterr().out.split()[1])  # the bowed curve
    served = api.request("GET", f"/v1/channels/{cid}/snapshots/{first}?against={second}")["curve_difference"]
    assert served["against"] == second and served["grid_points"] == 201 and served["left_out"] == 0
    # the standard grid: 201 points over [0, 100] (numpy), so the largest is at 33.5, not 100/3
    grid = np.linspace(0.0, 100.0, 201)
    gap = np.abs(1.0 - 0.0002 * (grid - 100 / 3) ** 2)
    assert served["at"] == grid[np.argmax(gap)] == 33.5
    assert served["max"] == pytest.approx(gap.max(), rel=1e-9)

    assert main(["snapshots", "diff", cid, str(first), str(second)]) == 0
    out = capsys.readouterr().out
    assert f"largest curve difference {techcli.common._num(served['max'])} degC at raw = 33.5 mV" in out
    now = api.request("GET", f"/v1/channels/{cid}/snapshots/{first}")
    assert now["curve_difference"] == {**served, "against": None}  # the current curve is the second
    assert now["max_difference_from_current"] == served["max"]
    assert main(["rollback", cid, str(first)]) == 2  # not confirmed: shows the difference, changes nothing
    assert f"now vs the snapshot: largest curve difference {techcli.common._num(served['max'])} degC at raw = " \
           "33.5 mV" in capsys.readouterr().out


def test_calibrate_refuses_bad_files_and_reports_service_refusals(api: Client, tmp_path: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    """The service reads the file (as it does for the page): its message, one line, exit 1."""
    cid = "cal.bad"
    api.create_channel(poly(cid))
    cases = {
        "noy.csv": (["x", "z"], [[1, 2]], ["--y-col", "y"], "[csv]: y column 'y' is not in the header (its "
                                                            "columns: x, z)"),
        "text.csv": (["x", "y"], [[1, 2], [2, "warm"]], [], "[csv]: line 3: y is not a number: 'warm'"),
        "two.csv": (["x1", "x2", "y"], [[1, 2, 3]], [], "names 2 input column(s) (x1, x2), but the channel has 1"),
        "empty.csv": (["x", "y"], [], [], "no data rows"),
        "far.csv": (["x", "y"], [[1, 2]], ["--x-col", "4"], "x column 4 does not exist"),
    }
    for name, (header, rows, extra, message) in cases.items():
        assert main(["calibrate", cid, str(write_csv(tmp_path / name, header, rows)), "--yes", *extra]) == 1, name
        err = capsys.readouterr().err
        assert message in err and "the service refused the request (422" in err and len(err.splitlines()) == 1, err
    assert main(["calibrate", cid, str(tmp_path / "missing.csv"), "--yes"]) == 2
    assert "missing.csv" in capsys.readouterr().err
    # one point cannot fit a line: the service's 422 message, exit 1
    assert main(["calibrate", cid, str(write_csv(tmp_path / "one.csv", ["x", "y"], [[1, 2]])), "--yes"]) == 1
    err = capsys.readouterr().err
    assert "the service refused the request (422" in err and len(err.splitlines()) == 1
    assert api.get_channel(cid)["version"] == 0


def test_calibrate_reads_what_the_page_reads(api: Client, tmp_path: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    """A comment line, a header of the user's own names, ';' between fields; columns by name
    or position; the terms named as the service names them; the residual s.d. in degC."""
    cid = "cal.ntc"
    api.create_channel({"id": cid, "inputs": [{"name": "raw", "unit": "ohm", "min": 1000.0, "max": 40000.0}],
                        "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal",
                                   "offset": 273.15}, "basis": {"kind": "log_poly", "powers": [0, 1, 3]}})
    r = np.array([28000.0, 19000.0, 12500.0, 8000.0, 5300.0, 3600.0])
    t = [1.0 / (1.129e-3 + 2.341e-4 * np.log(v) + 8.775e-8 * np.log(v) ** 3) - 273.15 for v in r]  # Steinhart-Hart
    text = "# bath 3, reference PRT\nstep;resistance_ohm;bath_degC\n" + "".join(
        f"{i};{a};{b + (0.01 if i % 2 else -0.01)}\n" for i, (a, b) in enumerate(zip(r, t, strict=True)))
    path = tmp_path / "bath.csv"
    path.write_text(text)
    assert main(["calibrate", cid, str(path), "--x-col", "Resistance_Ohm", "--y-col", "3", "--yes"]) == 0
    out = capsys.readouterr().out
    assert "read 6 row(s): inputs from resistance_ohm, reference from bath_degC" in out
    rows = {line.split()[0] for line in out.splitlines() if line.startswith("  ") and len(line.split()) == 3}
    names = api.request("GET", f"/v1/channels/{cid}/curve?points=2")["raw_term_names"]
    assert names == ["1", "ln(raw)", "ln(raw)^3"] and set(names) <= rows  # the service's names
    sd = next(line for line in out.splitlines() if "residual s.d." in line)
    cal = api.request("GET", f"/v1/channels/{cid}/events?kind=calibration")["items"][-1]["details"]
    ch = api.get_channel(cid)
    assert f"{techcli.common._num(ch['residual_sd_output'], 4)} degC (in the fitted space" in sd
    assert cal["n"] == 6 and [p[0] for p in cal["points"]] == [[v] for v in r.tolist()]
    assert main(["channels", "show", cid]) == 0
    out = capsys.readouterr().out
    assert f"residual s.d.    {techcli.common._num(ch['residual_sd_output'], 4)} degC (in the fitted space " in out
    assert "operating range  raw [3600, 28000] (calibration)" in out
    assert main(["curve", cid, "--points", "2"]) == 0
    assert f"residual s.d. {techcli.common._num(ch['residual_sd_output'], 4)} degC" in capsys.readouterr().out
    # no header at all: the first column the input, the second the reference
    plain = tmp_path / "plain.csv"
    plain.write_text("".join(f"{a},{b}\n" for a, b in zip(r, t, strict=True)))
    assert main(["calibrate", cid, str(plain), "--yes"]) == 0
    assert "inputs from column 1, reference from column 2" in capsys.readouterr().out


# samples --------------------------------------------------------------------------------
def test_load_is_resumable_and_export_round_trips(api: Client, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    cid = "load.c1"
    api.create_channel(poly(cid))
    rows = [[round(0.37 * i, 6), round(2.0 + 0.5 * 0.37 * i + 0.01 * ((-1) ** i), 6),
             f"2026-12-01T{i // 60:02d}:{i % 60:02d}:00Z"] for i in range(250)]
    data = write_csv(tmp_path / "bench-log.csv", ["x", "y", "t"], rows)
    # an interrupted load: the first 100 rows only
    write_csv(tmp_path / "part.csv", ["x", "y", "t"], rows[:100])
    assert main(["samples", "load", cid, str(tmp_path / "part.csv"), "--source", "log-1"]) == 0
    assert "100 accepted, 0 duplicates, 0 rejected" in capsys.readouterr().out
    assert main(["samples", "load", cid, str(data), "--source", "log-1", "--batch", "64"]) == 0
    assert "250 rows" in (out := capsys.readouterr().out) and "150 accepted, 100 duplicates, 0 rejected" in out
    assert main(["samples", "load", cid, str(data), "--source", "log-1", "--batch", "64"]) == 0
    assert "0 accepted, 250 duplicates, 0 rejected" in capsys.readouterr().out
    stored = all_samples(api, cid)
    assert len(stored) == 250 and [s["source_seq"] for s in stored] == list(range(1, 251))

    out_file = tmp_path / "export.csv"
    assert main(["samples", "export", cid, "--out", str(out_file)]) == 0
    assert "250 sample(s)" in capsys.readouterr().err
    with out_file.open(newline="") as f:
        exported = list(csv.DictReader(f))
    assert len(exported) == len(stored)
    for e, s in zip(exported, stored, strict=True):
        assert int(e["seq"]) == s["seq"] and int(e["source_seq"]) == s["source_seq"] and e["source"] == "log-1"
        assert float(e["x"]) == s["x"][0] and float(e["y"]) == s["y"] and e["t"] == s["t"]
        assert e["accepted"] == ("true" if s["accepted"] else "false")
        assert (float(e["residual"]) if e["residual"] else None) == s["residual"]
    assert main(["samples", "export", cid]) == 0  # to standard output
    assert capsys.readouterr().out == out_file.read_text()

    # the export loads into another channel as it is (x, y, t columns; the rest ignored)
    api.create_channel(poly("load.c2"))
    assert main(["samples", "load", "load.c2", str(out_file)]) == 0
    assert "250 accepted, 0 duplicates" in capsys.readouterr().out
    assert [(s["x"], s["y"], s["t"]) for s in all_samples(api, "load.c2")] == [(s["x"], s["y"], s["t"]) for s in stored]


def test_load_refuses_bad_rows_and_reports_the_service_message(api: Client, tmp_path: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    cid = "load.bad"
    api.create_channel(poly(cid))
    bad_t = write_csv(tmp_path / "t.csv", ["x", "y", "t"], [[1, 2, "2026-12-01T10:00:00Z"], [2, 3, "2026-12-01 11:00"]])
    assert main(["samples", "load", cid, str(bad_t)]) == 2
    assert "line 3: t needs a time zone" in capsys.readouterr().err
    bad_x = write_csv(tmp_path / "x.csv", ["x", "y"], [[1, 2], ["nan", 3]])
    assert main(["samples", "load", cid, str(bad_x)]) == 2
    assert "line 3: x is not a finite number" in capsys.readouterr().err
    huge = write_csv(tmp_path / "huge.csv", ["x", "y"], [[1, 2], [1e40, 3]])  # past a reading's 1e38
    assert main(["samples", "load", cid, str(huge), "--batch", "1"]) == 1
    err = capsys.readouterr().err
    assert "stopped after 1 of 2 rows" in err and "the service refused the request (422" in err
    assert api.get_channel(cid)["n_samples"] == 1
    assert main(["samples", "load", "no.channel", str(huge)]) == 1
    assert "404" in capsys.readouterr().err
    # the calibrate route's reader: comment lines, ';' between fields, a header of other names
    noted = tmp_path / "noted.csv"
    noted.write_text("# logger 7\nreading_mV;kPa;t\n3;4;2026-12-01T12:00:00Z\n")
    assert main(["samples", "load", cid, str(noted)]) == 0
    assert "1 accepted" in capsys.readouterr().out
    assert [(s["x"], s["y"], s["t"]) for s in all_samples(api, cid)][-1] == ([3.0], 4.0, "2026-12-01T12:00:00Z")


def test_two_input_channel(api: Client, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cid = "two.c1"
    api.create_channel({"id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 10.0},
                                              {"name": "tc", "unit": "degC", "min": 0.0, "max": 40.0}],
                        "output": {"name": "p", "unit": "kPa"}, "basis": {"kind": "poly", "degree": 1}})
    pts = [[a, b, 1.0 + 2.0 * a + 0.1 * b] for a in (0.0, 5.0, 10.0) for b in (0.0, 20.0, 40.0)]
    assert main(["calibrate", cid, str(write_csv(tmp_path / "b.csv", ["x1", "x2", "y"], pts)), "--yes"]) == 0
    assert "R-squared             1\n" in capsys.readouterr().out
    named = write_csv(tmp_path / "n.csv", ["kPa_ref", "temp_C", "signal_mV"], [[p[2], p[1], p[0]] for p in pts])
    assert main(["calibrate", cid, str(named), "--x-col", "signal_mV,temp_C", "--y-col", "kPa_ref", "--yes"]) == 0
    out = capsys.readouterr().out
    assert "inputs from signal_mV, temp_C, reference from kPa_ref" in out and "raw*tc" not in out
    assert "R-squared             1\n" in out and "  tc  " in out
    swapped = write_csv(tmp_path / "s.csv", ["x2", "x1", "y"], [[20.0, 5.0, 13.0]])  # columns by name
    assert main(["samples", "load", cid, str(swapped)]) == 0
    assert "1 accepted" in capsys.readouterr().out
    assert all_samples(api, cid)[0]["x"] == [5.0, 20.0]
    assert main(["samples", "export", cid]) == 0
    assert capsys.readouterr().out.splitlines()[0].split(",")[5:7] == ["x1", "x2"]
    assert main(["curve", cid, "--points", "9"]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[0].split()[:4] == ["raw", "[mV]", "tc", "[degC]"]


def test_help_carries_the_caution_and_every_argument_its_help(capsys: pytest.CaptureFixture[str]) -> None:
    import argparse

    from curvekeeper.cli import build_parser

    with pytest.raises(SystemExit):
        main(["--help"])
    assert "does not replace traceable, accredited calibration" in " ".join(capsys.readouterr().out.split())
    missing = []

    def walk(parser: argparse.ArgumentParser, where: str) -> None:
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, sub in action.choices.items():
                    walk(sub, f"{where} {name}")
            elif not isinstance(action, argparse._HelpAction) and not action.help:
                missing.append(f"{where}: {'/'.join(action.option_strings) or action.dest}")

    walk(build_parser(), "curvekeeper")
    assert missing == []


def test_the_forecast_in_words() -> None:
    from curvekeeper.techcli.commands import _forecast

    assert _forecast(None, "degC").startswith("- (no tolerance")
    assert _forecast({"not_within_days": 365, "rate": 3.3e-5}, "degC") == "not within 365 days (drift 3.3e-05 degC/day)"
    f = {"leaves_tolerance_on": "2026-12-26T00:00:00+00:00", "low": "2026-12-21T00:00:00+00:00",
         "high": "2026-12-30T00:00:00+00:00", "rate": 0.00171, "not_within_days": None}
    assert _forecast(f, "degC") == ("leaves tolerance on 2026-12-26 (95 % interval 2026-12-21 to 2026-12-30; "
                                    "drift 0.00171 degC/day)")
