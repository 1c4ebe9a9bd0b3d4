"""The demo's story, in fast mode, against a real service on loopback."""

from __future__ import annotations

import socket
from pathlib import Path

import numpy as np
import pytest
from curvekeeper.demo import scenario
from curvekeeper.demo.run import DemoResult, run_demo


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.mark.slow
def test_the_demo_flags_the_faulty_probe_only_and_its_rollback_restores_the_snapshot(tmp_path: Path) -> None:
    lines: list[str] = []
    result = run_demo(db=tmp_path / "demo.db", port=free_port(), fast=True, say=lines.append, keep_running=False)
    # the faulty probe's step and the fast-ageing probe raise the drift alarm, the ordinary
    # ageing of the others (0.0002 % a day) does not; the forecast probe's (0.01 % a day) may,
    # with a reading every 2 hours, and the story then tells it
    assert set(result.alarms) - {scenario.FORECAST} == {scenario.FAULTY, scenario.AGEING}
    if scenario.FORECAST in result.alarms:
        assert "  Its drift alarm came on day" in "\n".join(lines).split("Forecast:")[1]
    assert result.alarm_day is not None and scenario.FAULT_DAY <= result.alarm_day < scenario.FAULT_DAY + 1
    # the ageing probe also leaves tolerance; the rest are healthy
    assert result.out_of_tolerance == [scenario.AGEING]
    assert result.rollback_restores and result.rollback_snapshot is not None
    # taken out of service until inspected, its alarm acknowledged
    assert result.faulty_after == ("out_of_service", "ok")
    assert result.samples == 8 * 60 * 12
    text = "\n".join(lines)
    assert "Drift alarm: coldstore.produce.p2 on day 40" in text and result.key in text
    # the command line and the admin commands find the demo (another port than 8000 here)
    assert f"export CURVEKEEPER_URL={result.url}" in text and f"export CURVEKEEPER_KEY={result.key}" in text
    assert f"--db sqlite:///{tmp_path / 'demo.db'}" in text
    assert "does not replace traceable, accredited calibration" in text  # the closing caution
    _the_records_and_the_forecast(tmp_path / "demo.db", result, text)


def _the_records_and_the_forecast(db: Path, result: DemoResult, text: str) -> None:
    """The reference with its certificate, a day-0 record naming it on every probe, and the
    forecast probe expected to leave tolerance before its due date, read back from the store."""
    from curvekeeper.api import create_app
    from curvekeeper.config import Settings
    from fastapi.testclient import TestClient

    secret = "ck_demo-test-readback-0123456789"
    rid = scenario.REFERENCE["id"]
    app = create_app(Settings(database_url=f"sqlite:///{db}", admin_key=secret, webhook_dispatch_s=0.0))
    with TestClient(app) as api:
        api.headers["Authorization"] = f"Bearer {secret}"
        ref = api.get(f"/v1/references/{rid}").json()
        assert (ref["certificate"], ref["calibrated_on"], ref["due_on"]) == ("CS-TH-2026-0917", "2026-09-14",
                                                                            "2027-09-14")
        assert ref["standard_uncertainty"] == pytest.approx(0.01)  # U 0.02 at k 2 (GUM 4.3.3: u = U / k)
        for p in scenario.PROBES:
            cid = scenario.channel_id(p)
            records = api.get(f"/v1/channels/{cid}/calibrations").json()["items"]
            day0 = [r for r in records if r["at"] == "2026-10-01T00:00:00Z"]
            assert [r["id"] for r in day0] == [result.records[cid]], cid
            assert [r["id"] for r in day0[0]["references"]] == [rid]
            assert len(day0[0]["as_found"]) == len(day0[0]["as_left"]) == 30 and day0[0]["verdict"] == "pass"
        ch = api.get(f"/v1/channels/{scenario.FORECAST}").json()
    # within tolerance at the end, expected to leave it before its due date (day 0 + 365 days)
    assert ch["drift"]["max_curve_change"] < ch["drift"]["tolerance"] and ch["due_on"] == "2027-10-01"
    assert ch["forecast"]["leaves_tolerance_on"] is not None
    assert ch["forecast"]["leaves_tolerance_on"][:10] < ch["due_on"] == result.due_on
    assert result.leaves_tolerance_on == ch["forecast"]["leaves_tolerance_on"]
    assert (f"it is expected to leave tolerance on {result.leaves_tolerance_on[:10]}" in text
            and f"before its recalibration is due on {result.due_on}" in text)
    assert (f"{scenario.FORECAST} (forecast to leave tolerance on {result.leaves_tolerance_on[:10]}, due on "
            f"{result.due_on})") in text
    # the closing text points at the records and the report
    assert f"--reference {rid} --dry-run" in text and "/ui/references" in text
    assert f"/ui/channels/{scenario.FORECAST}" in text and f"curvekeeper report {scenario.FORECAST} --out" in text


def test_the_demo_tells_its_progress_without_a_terminal() -> None:
    """Under pytest stderr is no terminal: a line at each quarter of the stream, with the total."""
    from curvekeeper.demo.run import Progress

    lines: list[str] = []
    progress = Progress(lines.append)
    for _ in range(8):
        progress(125, 1000)  # eight requests of 125 samples
    assert lines == [f"  streamed {n:,} of 1,000 samples ({q} %)" for n, q in
                     ((250, 25), (500, 50), (750, 75), (1000, 100))]


def test_the_scenario_is_seeded_and_physical() -> None:
    a, b = scenario.stream(seed=3, days=2, step_min=60), scenario.stream(seed=3, days=2, step_min=60)
    assert np.array_equal(a.raw, b.raw) and a.channel == b.channel
    # the nominal part: 10 kohm near 25 degC (Steinhart-Hart set of standards.json: 9999.85 ohm)
    assert scenario.resistance_nominal(np.array([25.0]))[0] == pytest.approx(9999.85, abs=0.05)
    # colder is more resistance (NTC), and the fault lowers the faulty probe's resistance
    p = scenario.make_probes(7)[scenario.FAULTY]
    t = np.array([5.0, 5.0])
    before, after = p.resistance(t, np.array([39.9, 40.1]))
    assert after < before * 0.995
    assert scenario.resistance_nominal(np.array([-20.0]))[0] > scenario.resistance_nominal(np.array([20.0]))[0]


def test_simulate_command_posts_the_scenario_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    from curvekeeper.cli import main
    from curvekeeper.config import Settings
    from curvekeeper.demo.run import start_server

    secret = "ck_simulate-test-0123456789"
    port = free_port()
    server, thread = start_server(Settings(database_url=f"sqlite:///{tmp_path / 's.db'}", port=port,
                                           admin_key=secret, webhook_dispatch_s=0.0))
    try:
        argv = ["simulate", "--url", f"http://127.0.0.1:{port}", "--days", "1", "--step-min", "60"]
        monkeypatch.delenv("CURVEKEEPER_KEY", raising=False)
        assert main(argv) == 2
        monkeypatch.setenv("CURVEKEEPER_KEY", secret)
        assert main(argv) == 0
        assert "192 learned" in capsys.readouterr().out
        assert main(argv) == 0  # a re-run sends the same (source, seq): nothing is learned twice
        assert "0 learned, 0 held back, 192 duplicates" in capsys.readouterr().out
    finally:
        server.should_exit = True
        thread.join(timeout=10)
