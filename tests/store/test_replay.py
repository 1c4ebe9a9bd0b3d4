"""`curvekeeper replay` and `curvekeeper db backup` on a store written through the API."""

from __future__ import annotations

import json
import sqlite3
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper.cli import main
from curvekeeper.store import Store
from fastapi.testclient import TestClient
from sqlalchemy import text


def feed(client: TestClient, h: dict[str, str], channel: str, n: int, seq0: int, offset: float = 0.0,
         seed: int = 0) -> Any:
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 100, n)
    y = 1 + 0.02 * x + rng.normal(0, 0.05, n) + offset
    body = {"source": "rig", "samples": [{"x": float(a), "y": float(b), "seq": seq0 + i}
                                         for i, (a, b) in enumerate(zip(x, y, strict=True))]}
    r = client.post(f"/v1/channels/{channel}/samples", json=body, headers=h)
    assert r.status_code == 200, r.text
    return r.json()


@pytest.fixture
def history(client: TestClient, admin: dict[str, str]) -> str:
    """A channel with samples, a calibration on history, a settings change, an alarm and a rollback."""
    ch = "site-a.replay1"
    r = client.post("/v1/channels", json={"id": ch, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
                                          "output": {"unit": "V"},
                                          "basis": {"kind": "poly", "degree": 2}, "snapshot_every": 70},
                    headers=admin)
    assert r.status_code == 201
    feed(client, admin, ch, 120, 0, seed=1)
    cal = client.post(f"/v1/channels/{ch}/calibrate", headers=admin, json={
        "include_history": True, "last": 60, "points": [{"x": 0, "y": 1.0}, {"x": 100, "y": 3.0}]})
    assert cal.status_code == 200
    feed(client, admin, ch, 90, 1000, seed=2)
    assert client.patch(f"/v1/channels/{ch}", headers=admin,
                        json={"learner": {"kind": "rls", "forgetting": 0.995},
                              "drift": {"tolerance": 0.2}}).status_code == 200
    feed(client, admin, ch, 80, 2000, offset=1.5, seed=3)  # a lasting step: outliers and an alarm
    assert client.post(f"/v1/channels/{ch}/rollback", headers=admin,
                       json={"snapshot": cal.json()["snapshot_after"]}).status_code == 200
    feed(client, admin, ch, 50, 3000, seed=4)
    return ch


def test_replay_check_reproduces_the_stored_state(client: TestClient, history: str, database_url: str,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["replay", history, "--check", "--quiet", "--db", database_url]) == 0
    out = capsys.readouterr().out
    assert "bit for bit" in out and "replayed 340 samples and 3 state changes" in out


@pytest.fixture
def lifecycle(client: TestClient, admin: dict[str, str]) -> str:
    """A channel through every lifecycle change: out of service and back (by a calibration
    and by the route), an alarm acknowledged, settings changed, rollbacks with and without
    set_reference. No calibration after the acknowledgement: its effect on the drift watch
    lasts to the end, as does each rollback's on the reference."""
    ch = "site-a.replay2"
    base = f"/v1/channels/{ch}"
    r = client.post("/v1/channels", json={"id": ch, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
                                          "output": {"unit": "V"},
                                          "drift": {"tolerance": 0.1}, "snapshot_every": 50}, headers=admin)
    assert r.status_code == 201

    def call(path: str, body: dict[str, Any]) -> Any:
        r = client.post(f"{base}/{path}", json=body, headers=admin)
        assert r.status_code == 200, r.text
        return r.json()

    line = [{"x": float(x), "y": 1 + 0.02 * float(x) + e} for x, e in zip(np.linspace(0, 100, 20),
                                                                          np.random.default_rng(9).normal(0, 0.05, 20),
                                                                          strict=True)]
    first = call("calibrate", {"points": line})
    call("service", {"state": "out_of_service", "note": "repair"})
    assert feed(client, admin, ch, 40, 0, offset=0.5, seed=1)["accepted"] == 0
    call("calibrate", {"points": line[::2]})  # back in service by a calibration
    assert feed(client, admin, ch, 60, 100, offset=0.5, seed=2)["drift"]["state"] == "alarm"
    call("acknowledge", {"note": "door open"})
    feed(client, admin, ch, 30, 200, seed=3)
    assert client.patch(base, headers=admin, json={"drift": {"alarm": 20.0}}).status_code == 200
    call("service", {"state": "out_of_service", "note": "again"})
    feed(client, admin, ch, 20, 300, seed=4)  # the 150th sample: a periodic snapshot out of service
    call("service", {"state": "in_service", "note": "back"})
    snaps = client.get(f"{base}/snapshots", params={"limit": 1000}, headers=admin).json()["items"]
    learned = next(s["id"] for s in snaps if s["reason"] == "periodic" and s["n_samples"] == 100)
    # the effect of each rollback lasts to the end (no calibration comes after them): the first
    # calibration's curve becomes the reference, then a curve that learnt the offset comes back
    assert call("rollback", {"snapshot": first["snapshot_after"], "set_reference": True}
                )["reference_curve"] == "restored_snapshot"
    feed(client, admin, ch, 30, 400, seed=5)
    assert call("rollback", {"snapshot": learned})["reference_curve"] == "kept"
    # on the line: the alarm acknowledged above is not raised again (a replay without the
    # acknowledgement would end in alarm)
    assert feed(client, admin, ch, 30, 500, seed=6)["drift"]["state"] == "ok"
    before = client.get(base, headers=admin).json()
    # where curves are compared: the tolerance check runs again over the declared range
    narrowed = client.patch(base, headers=admin, json={"inputs": [{"operating_range": [10, 30]}]})
    assert narrowed.status_code == 200
    assert narrowed.json()["drift"]["max_curve_change"] != before["drift"]["max_curve_change"]
    return ch


def test_replay_check_reproduces_every_lifecycle_change(client: TestClient, admin: dict[str, str], lifecycle: str,
                                                        database_url: str, capsys: pytest.CaptureFixture[str]
                                                        ) -> None:
    kinds = [e["kind"] for e in client.get(f"/v1/channels/{lifecycle}/events", params={"limit": 1000},
                                           headers=admin).json()["items"]]
    for kind in ("acknowledged", "service_changed", "rollback", "settings_changed", "calibration"):
        assert kind in kinds
    assert main(["replay", lifecycle, "--check", "--quiet", "--db", database_url]) == 0
    out = capsys.readouterr().out
    # 2 calibrations, 3 service changes, 1 acknowledgement, 2 settings changes, 2 rollbacks
    assert "bit for bit" in out and "replayed 210 samples and 10 state changes" in out
    # from every snapshot of the channel's state at its version (periodic ones, those before a
    # calibration or rollback, one taken out of service); an alarm's snapshot holds an earlier curve
    snaps = client.get(f"/v1/channels/{lifecycle}/snapshots", params={"limit": 1000}, headers=admin).json()["items"]
    assert {s["reason"] for s in snaps} == {"calibration", "before-calibrate", "periodic", "drift-alarm",
                                           "before-rollback"}
    for snap in (s for s in snaps if s["reason"] != "drift-alarm"):
        assert main(["replay", lifecycle, "--from-snapshot", str(snap["id"]), "--check", "--quiet",
                     "--db", database_url]) == 0, snap
    # the alarm's snapshot is refused as a starting point, with the reason
    alarm = next(s for s in snaps if s["reason"] == "drift-alarm")
    capsys.readouterr()
    assert main(["replay", lifecycle, "--from-snapshot", str(alarm["id"]), "--check", "--quiet",
                 "--db", database_url]) != 0
    assert "before the estimated change point" in capsys.readouterr().err


def test_replay_from_a_snapshot(client: TestClient, admin: dict[str, str], history: str, database_url: str) -> None:
    snaps = client.get(f"/v1/channels/{history}/snapshots", headers=admin).json()["items"]
    periodic = [s for s in snaps if s["reason"] == "periodic"]
    assert periodic
    assert main(["replay", history, "--from-snapshot", str(periodic[-1]["id"]), "--check", "--quiet",
                 "--db", database_url]) == 0


def test_replay_check_finds_a_tampered_state(client: TestClient, history: str, database_url: str,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    store = Store(database_url)
    try:
        with store.transaction(write=True) as repo:
            state = repo.model_state(1)
            state["weights"][0] += 1e-12
            repo.session.execute(text("UPDATE channel_state SET model_state = :s WHERE channel_pk = 1"),
                                 {"s": json.dumps(state)})
    finally:
        store.dispose()
    assert main(["replay", history, "--check", "--quiet", "--db", database_url]) == 1
    assert "weights differ" in capsys.readouterr().err


def test_replay_of_an_unknown_channel_or_snapshot_fails_cleanly(client: TestClient, history: str,
                                                                database_url: str) -> None:
    assert main(["replay", "site-a.nope", "--check", "--quiet", "--db", database_url]) == 2
    assert main(["replay", history, "--from-snapshot", "9999", "--quiet", "--db", database_url]) == 2


def test_online_backup_while_samples_arrive(tmp_path: Path, client: TestClient, admin: dict[str, str],
                                            history: str, database_url: str) -> None:
    if not database_url.startswith("sqlite"):
        assert main(["db", "backup", str(tmp_path / "b.db"), "--db", database_url]) == 2
        return
    stop = threading.Event()
    posted = []

    def writer() -> None:
        seq = 10_000
        while not stop.is_set() and seq < 10_000 + 40 * 25:
            posted.append(feed(client, admin, history, 25, seq, seed=seq))
            seq += 25

    t = threading.Thread(target=writer)
    t.start()
    try:
        target = tmp_path / "backup.db"
        assert main(["db", "backup", str(target), "--db", database_url]) == 0
    finally:
        stop.set()
        t.join()
    con = sqlite3.connect(target)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    n_backup = con.execute("SELECT count(*) FROM sample").fetchone()[0]
    con.close()
    assert n_backup >= 340
    # the copy is a consistent store on its own: its log replays to its own state
    assert main(["replay", history, "--check", "--quiet", "--db", f"sqlite:///{target}"]) == 0
    assert main(["db", "backup", str(target), "--db", database_url]) == 2  # never overwrites
