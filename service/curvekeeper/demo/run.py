"""``curvekeeper demo``: the cold store's sixty days, told in about 15 seconds.

Starts the service on a SQLite file, creates the reference thermometer and a channel per
probe, calibrates each on the bench against that reference (a record each), streams the
scenario through a simulated fleet in accelerated time, then tells which probe drifted,
when its alarm fired, rolls that probe back to the snapshot the alarm took, and reads the
forecast of the probe expected to leave tolerance before its due date. The service then
keeps running until Ctrl-C.
"""

from __future__ import annotations

import secrets
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import uvicorn

from ..api import create_app
from ..client import Client
from ..config import Settings
from ..kernels import PROCESS
from . import scenario
from .simulator import simulate

T0 = datetime(2026, 10, 1, tzinfo=UTC)
GATEWAY_ROOMS = ("chill", "produce")
#: time steps per request: every device posts half a day of readings at once (at a reading
#: every 30 minutes), the gateway half a day of its probes'; fewer, larger requests
BATCH_STEPS = 24


@dataclass
class DemoResult:
    url: str
    key: str
    alarms: list[str] = field(default_factory=list)
    out_of_tolerance: list[str] = field(default_factory=list)
    alarm_day: float | None = None
    rollback_snapshot: int | None = None
    rollback_restores: bool = False
    #: the faulty probe after the technician's steps: its service state and drift state
    faulty_after: tuple[str, str] | None = None
    #: the day-0 calibration record's id per probe
    records: dict[str, int] = field(default_factory=dict)
    #: the forecast probe at the end: when it is expected to leave tolerance, and its due date
    leaves_tolerance_on: str | None = None
    due_on: str | None = None
    samples: int = 0
    seconds: float = 0.0


class _Server(uvicorn.Server):
    def install_signal_handlers(self) -> None:  # the demo's own thread handles Ctrl-C
        pass


def start_server(settings: Settings) -> tuple[_Server, threading.Thread]:
    server = _Server(uvicorn.Config(create_app(settings), host=settings.host, port=settings.port,
                                    log_level="warning", access_log=False))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 60
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError(f"the service did not start on {settings.host}:{settings.port}")
        time.sleep(0.05)
    # the story's first requests would otherwise wait for the compiled kernels (the app's
    # lifespan builds them in a thread); a failed build leaves them to compile on first use
    PROCESS.wait(timeout=max(deadline - time.monotonic(), 0.0))
    return server, thread


def run_demo(*, db: Path, host: str = "127.0.0.1", port: int = 8000, fast: bool = False, seed: int = 7,
             say: Callable[[str], None] = print, keep_running: bool = True,
             progress: Callable[[int, int], None] | None = None) -> DemoResult:
    """Tell the cold store's story against a fresh store at ``db``; returns what happened."""
    for suffix in ("", "-wal", "-shm"):
        Path(f"{db}{suffix}").unlink(missing_ok=True)
    key = "ck_demo_" + secrets.token_urlsafe(18)
    settings = Settings(database_url=f"sqlite:///{db}", host=host, port=port, admin_key=key)
    server, thread = start_server(settings)
    url = f"http://{host}:{port}"
    result = DemoResult(url=url, key=key)
    started = time.monotonic()
    try:
        with Client(url, key, timeout=60) as c:
            _story(c, result, fast=fast, seed=seed, say=say, progress=progress)
        result.seconds = time.monotonic() - started
        say(f"\nThe technician's pages: {url}/ui/ (API documentation at {url}/docs).")
        say(f"Sign in with the admin key: {key}")
        say("The command line against this demo, from another shell:")
        say(f"  export CURVEKEEPER_URL={url}")
        say(f"  export CURVEKEEPER_KEY={key}")
        say("  curvekeeper channels list")
        say(f"Admin commands on the demo's store take --db sqlite:///{db}, e.g. "
            f"curvekeeper keys create --role technician --db sqlite:///{db}")
        when = (result.leaves_tolerance_on or "not within a year")[:10]
        say(f"Look at {scenario.FAULTY} (the alarm and the rollback), {scenario.AGEING} (out of tolerance) and "
            f"{scenario.FORECAST} (forecast to leave tolerance on {when}, due on {result.due_on}).")
        _tell_records(db, url, seed, say)
        # the alarm was acknowledged, so the probe is no longer in alarm: show its alarm event
        auth = f"curl -s -H 'Authorization: Bearer {key}'"
        say(f"Try: {auth} '{url}/v1/channels/{scenario.FAULTY}/events?kind=drift_alarm'")
        say(f"     {auth} '{url}/v1/channels?state=out_of_tolerance'")
        say("Caution: the story is invented. curvekeeper supports calibration work; it does not replace "
            "traceable, accredited calibration, nor the regulations where the sensors are used.")
        if keep_running:
            say("Ctrl-C stops it.")
            if threading.current_thread() is threading.main_thread():
                signal.signal(signal.SIGTERM, _interrupt)  # stop as on Ctrl-C
            while thread.is_alive():
                thread.join(timeout=0.5)
    except KeyboardInterrupt:
        say("stopping")
    finally:
        server.should_exit = True
        thread.join(timeout=10)
    return result


def _story(c: Client, result: DemoResult, *, fast: bool, seed: int, say: Callable[[str], None],
           progress: Callable[[int, int], None] | None) -> None:
    step = 120.0 if fast else 30.0
    stream = scenario.stream(seed=seed, days=60.0, step_min=step)
    probes = [scenario.channel_id(p) for p in scenario.PROBES]
    say(f"A cold store with {len(probes)} thermistor probes in four rooms, each beside a reference "
        f"thermometer: 60 days of readings every {step:.0f} minutes.")
    for p in scenario.PROBES:
        c.create_channel(scenario.channel_config(p))
    ref = c.request("POST", "/v1/references", json=scenario.REFERENCE, idempotent=False)
    say(f"The reference thermometer {ref['id']}: certificate {ref['certificate']}, U = {ref['expanded_uncertainty']} "
        f"degC (k = {ref['coverage_factor']}), calibrated {ref['calibrated_on']}, due {ref['due_on']}.")
    say("Day 0: each probe is calibrated in a bath against it (Steinhart-Hart fit); each calibration is recorded.")
    for cid in probes:
        rep = c.request("POST", f"/v1/channels/{cid}/calibrate", idempotent=False, json={
            "points": scenario.bench_points(seed, cid), "label": "day-0 bath calibration",
            "reference": ref["id"], "at": T0.isoformat(),
            "conditions": {"values": {"bath": "stirred ethanol-water bath"}, "note": "10 min soak at each set point"}})
        result.records[cid] = rep["calibration"]
        record = rep["record"]
        say(f"  {cid:24} residual {rep['rmse_output'] * 1000:5.1f} mdegC over {rep['n']} points; record "
            f"{rep['calibration']}: as found {record['as_found_verdict']}, as left {record['verdict']}")
    gateway = [cid for cid in probes if cid.split(".")[1] in GATEWAY_ROOMS]
    say(f"Streaming {len(stream.channel):,} samples: {', '.join(GATEWAY_ROOMS)} rooms through gateway gw-1, "
        "the other probes as single devices ...")
    total = len(stream.channel)
    report = simulate(c, stream, t0=T0, gateway=gateway, gateway_steps=BATCH_STEPS, device_batch=BATCH_STEPS,
                      progress=None if progress is None else (lambda k: progress(k, total)))
    result.samples = report.accepted + report.rejected
    say(f"  {report.requests} requests: {report.accepted:,} samples learned, {report.rejected} held back "
        f"as outliers, {report.duplicates} duplicates")
    alarm = c.request("GET", "/v1/channels?state=alarm")["items"]
    tol = c.request("GET", "/v1/channels?state=out_of_tolerance")["items"]
    result.alarms = [ch["id"] for ch in alarm]
    result.out_of_tolerance = [ch["id"] for ch in tol]
    healthy = [cid for cid in probes if cid not in result.alarms and cid not in result.out_of_tolerance]
    say(f"\nHealthy: {', '.join(healthy) or 'none'}")
    for ch in tol:
        d = ch["drift"]
        say(f"Out of tolerance: {ch['id']}: its curve moved {d['max_curve_change']:.2f} degC from the "
            f"day-0 calibration (tolerance {d['tolerance']} degC): steady ageing, time for a bench check.")
        if ch["id"] in result.alarms:
            day, _ = _first_alarm(c, ch["id"])
            say(f"  Its drift alarm came on day {day:.1f}, when its readings had moved from the day-0 curve "
                "faster than a slow ageing would; a recalibration clears it.")
    if scenario.FAULTY in result.alarms:
        _tell_alarm(c, scenario.FAULTY, result, say)
    _tell_forecast(c, result, say)


def _tell_forecast(c: Client, result: DemoResult, say: Callable[[str], None]) -> None:
    """The forecast probe: still within tolerance, expected to leave it before its due date."""
    ch = c.request("GET", f"/v1/channels/{scenario.FORECAST}")
    f, d = ch["forecast"] or {}, ch["drift"]
    result.due_on, result.leaves_tolerance_on = ch["due_on"], f.get("leaves_tolerance_on")
    when = "not within a year" if result.leaves_tolerance_on is None else result.leaves_tolerance_on[:10]
    say(f"Forecast: {scenario.FORECAST} is within tolerance (its curve moved {d['max_curve_change']:.3f} of "
        f"{d['tolerance']} degC), but drifts {f.get('rate', 0.0) * 365:.2f} degC a year: it is expected to leave "
        f"tolerance on {when} (95 % interval {(f.get('low') or '?')[:10]} to {(f.get('high') or '?')[:10]}), "
        f"before its recalibration is due on {result.due_on}: bring its bench check forward.")
    if scenario.FORECAST in result.alarms:  # with a reading every 2 hours (--fast) its ageing trips the detector
        day, _ = _first_alarm(c, scenario.FORECAST)
        say(f"  Its drift alarm came on day {day:.1f}: its readings moved from the day-0 curve faster than a slow "
            "ageing would.")


def _tell_records(db: Path, url: str, seed: int, say: Callable[[str], None]) -> None:
    """Where the calibration records are: the CLI's dry run, the pages, the PDF report."""
    bench = db.parent / f"{db.stem}-{scenario.FORECAST}-day60.csv"
    points = scenario.bench_points(seed, scenario.FORECAST, day=60.0)
    bench.write_text("x,y\n" + "".join(f"{p['x']},{p['y']}\n" for p in points))
    cid, rid = scenario.FORECAST, scenario.REFERENCE["id"]
    say("The calibration records:")
    say(f"  curvekeeper calibrate {cid} {bench} --reference {rid} --dry-run")
    say("    a bench check of that probe on day 60: its as-found table and verdict, nothing applied")
    say(f"  {url}/ui/channels/{cid}: the calibration history, as found and as left, with the verdicts")
    say(f"  {url}/ui/references: the reference thermometer, its certificate and due date")
    say(f"  curvekeeper report {cid} --out report.pdf: the day-0 record as a PDF report")


def _first_alarm(c: Client, cid: str) -> tuple[float, dict[str, Any]]:
    """The day (measurement time) of a channel's first drift alarm, and its event details."""
    events = c.request("GET", f"/v1/channels/{cid}/events?kind=drift_alarm")["items"]
    first: dict[str, Any] = events[0]["details"]
    page = c.request("GET", f"/v1/channels/{cid}/samples?limit=1&cursor={_cursor(first['sample_seq'] - 1)}")["items"]
    when = datetime.fromisoformat(page[0]["t"].replace("Z", "+00:00"))
    return (when - T0) / timedelta(days=1), first


def _tell_alarm(c: Client, cid: str, result: DemoResult, say: Callable[[str], None]) -> None:
    result.alarm_day, first = _first_alarm(c, cid)
    seq = first["sample_seq"]
    when = T0 + timedelta(days=result.alarm_day)
    say(f"Drift alarm: {cid} on day {result.alarm_day:.1f} ({when:%Y-%m-%d %H:%M} UTC), sample {seq}: "
        f"its residuals against the reference shifted (Page-Hinkley statistic {first['statistic']:.1f}).")
    snaps = c.request("GET", f"/v1/channels/{cid}/snapshots?limit=1000")["items"]
    alarm_snap = [s for s in snaps if s["reason"] == "drift-alarm"][0]
    probe_x = [10000.0, 30000.0, 90000.0]
    expected = c.predict(cid, probe_x, snapshot=alarm_snap["id"])
    before = c.predict(cid, probe_x)
    c.rollback(cid, alarm_snap["id"])
    after = c.predict(cid, probe_x)
    result.rollback_snapshot = alarm_snap["id"]
    result.rollback_restores = after["y"] == expected["y"] and after["u"] == expected["u"]
    change = max(abs(a - b) for a, b in zip(before["y"], after["y"], strict=True))
    say(f"Rollback: {cid} back to snapshot {alarm_snap['id']}, taken when the alarm fired (the curve from before "
        f"the estimated change point); the curve moves back by up to {change:.3f} degC, and its predictions "
        f"equal the snapshot's {'exactly' if result.rollback_restores else 'NOT exactly'}.")
    note = "sudden step: moisture in the housing suspected; probe to be inspected"
    c.request("POST", f"/v1/channels/{cid}/service", json={"state": "out_of_service", "note": note},
              idempotent=False)
    ch = c.request("POST", f"/v1/channels/{cid}/acknowledge", json={"note": "rolled back; " + note},
                   idempotent=False)
    result.faulty_after = (ch["service_state"], ch["drift"]["state"])
    say("  The probe itself needs a look: moisture in the housing shows as a sudden step like this one. It is "
        "out of service until then (its samples are stored, not learned), and the alarm is acknowledged.")


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def _cursor(seq: int) -> str:
    from ..actions.paging import encode_cursor

    return encode_cursor(seq)


class Progress:
    """The demo's streaming progress: a bar with its total in a terminal, otherwise a line at
    every quarter (a log or a pipe shows that the demo is working)."""

    def __init__(self, say: Callable[[str], None] = print) -> None:
        self.say = say
        self.done = 0
        self.next_quarter = 1
        self.bar: Any = None

    def __call__(self, k: int, total: int) -> None:
        import sys

        from tqdm import tqdm

        if self.bar is None and sys.stderr.isatty():
            self.bar = tqdm(total=total, unit="sample", desc="streaming", leave=False)
        self.done += k
        if self.bar is not None:
            self.bar.update(k)
            return
        while self.next_quarter <= 4 and self.done * 4 >= self.next_quarter * total:
            self.say(f"  streamed {self.done:,} of {total:,} samples ({25 * self.next_quarter} %)")
            self.next_quarter += 1

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def demo_command(args: Any) -> int:
    """Entry point of ``curvekeeper demo``."""
    progress = Progress()
    try:
        result = run_demo(db=Path(args.db_file), host=args.host, port=args.port, fast=args.fast,
                          keep_running=not args.no_wait, progress=progress)
    finally:
        progress.close()
    return 0 if result.rollback_restores and result.alarms else 1
