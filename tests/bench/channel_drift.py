"""The channel as a whole, through the HTTP API at default settings: in-control alarms and the
delay to an alarm after a 1 s.d. step, after bench calibrations of 5, 10 and 30 points.

Learner, outlier gate, drift watch and residual scale act together here, as a user meets
them: each run creates a channel (one input, 0-100, the defaults otherwise), calibrates it
with evenly spread points of a straight line plus seeded normal noise (s.d. 0.1), then posts
seeded samples in batches. In control, an alarm is acknowledged (``POST .../acknowledge``)
and counted; a step run adds 1 s.d. from sample ``STEP_AFTER`` after the calibration on.
"""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from .report import Table, percentile

SIG = 0.1
STEP_AFTER = 200  # in-control samples between the calibration and the step
ADMIN = "bench-admin-secret-0123456789abcdef"

PLAN: dict[str, dict[str, Any]] = {
    "smoke": {"points": (5, 30), "ic_runs": 1, "ic_len": 2_000, "step_runs": 4, "horizon": 300, "batch": 500},
    "quick": {"points": (5, 10, 30), "ic_runs": 30, "ic_len": 20_000, "step_runs": 100, "horizon": 1_000,
              "batch": 1_000},
    "full": {"points": (5, 10, 30), "ic_runs": 100, "ic_len": 20_000, "step_runs": 300, "horizon": 1_000,
             "batch": 1_000},
}


def truth(x: np.ndarray) -> np.ndarray:
    return 2.0 + 0.5 * x


class Api:
    """An in-process service on a fresh SQLite store."""

    def __init__(self, tmp: Path) -> None:
        from curvekeeper.api import create_app
        from curvekeeper.config import Settings
        from fastapi.testclient import TestClient

        settings = Settings(database_url=f"sqlite:///{tmp / 'bench.db'}", admin_key=ADMIN)
        self.client = TestClient(create_app(settings))
        self.client.__enter__()
        self.h = {"Authorization": f"Bearer {ADMIN}"}
        self.n = 0

    def close(self) -> None:
        self.client.__exit__(None, None, None)

    def calibrated(self, rng: np.random.Generator, points: int) -> str:
        self.n += 1
        cid = f"bench.c{self.n}"
        r = self.client.post("/v1/channels", headers=self.h, json={
            "id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
            "output": {"name": "value", "unit": "degC"}})
        r.raise_for_status()
        xc = np.linspace(0, 100, points)
        yc = truth(xc) + SIG * rng.standard_normal(points)
        r = self.client.post(f"/v1/channels/{cid}/calibrate", headers=self.h,
                             json={"points": [{"x": float(a), "y": float(b)} for a, b in zip(xc, yc, strict=True)]})
        r.raise_for_status()
        return cid

    def post(self, cid: str, x: np.ndarray, y: np.ndarray) -> str:
        """Posts one batch; the channel's drift state after it."""
        r = self.client.post(f"/v1/channels/{cid}/samples", headers=self.h,
                             json={"samples": [{"x": float(a), "y": float(b)} for a, b in zip(x, y, strict=True)]})
        r.raise_for_status()
        state: str = r.json()["drift"]["state"]
        return state

    def events(self, cid: str, kind: str) -> list[dict[str, Any]]:
        r = self.client.get(f"/v1/channels/{cid}/events", headers=self.h, params={"kind": kind, "limit": 1000})
        r.raise_for_status()
        items: list[dict[str, Any]] = r.json()["items"]
        return items

    def acknowledge(self, cid: str) -> None:
        self.client.post(f"/v1/channels/{cid}/acknowledge", headers=self.h,
                         json={"note": "benchmark: in-control alarm counted"}).raise_for_status()


def in_control(api: Api, points: int, p: dict[str, Any], seed: int) -> tuple[int, int]:
    """(alarms, samples) over ``ic_runs`` calibrations with ``ic_len`` samples after each."""
    alarms = samples = 0
    for run in range(p["ic_runs"]):
        rng = np.random.default_rng([seed, points, run])
        cid = api.calibrated(rng, points)
        for _ in range(p["ic_len"] // p["batch"]):
            x = rng.uniform(0, 100, p["batch"])
            state = api.post(cid, x, truth(x) + SIG * rng.standard_normal(p["batch"]))
            samples += p["batch"]
            if state == "alarm":  # at most one per batch: 1,000 samples is far below the ARL
                alarms += 1
                api.acknowledge(cid)
    return alarms, samples


def step_delays(api: Api, points: int, p: dict[str, Any], seed: int) -> tuple[np.ndarray, int]:
    """Delays (samples from the first shifted one to the alarm, horizon + 1 when none) and how
    many runs alarmed before the step (left out)."""
    delays, early = [], 0
    for run in range(p["step_runs"]):
        rng = np.random.default_rng([seed, points, 10_000 + run])
        cid = api.calibrated(rng, points)
        x = rng.uniform(0, 100, STEP_AFTER)
        if api.post(cid, x, truth(x) + SIG * rng.standard_normal(STEP_AFTER)) == "alarm":
            early += 1
            continue
        x = rng.uniform(0, 100, p["horizon"])
        api.post(cid, x, truth(x) + SIG + SIG * rng.standard_normal(p["horizon"]))
        alarm = api.events(cid, "drift_alarm")
        seq = alarm[0]["details"]["sample_seq"] if alarm else None
        delays.append(seq - STEP_AFTER if seq is not None else p["horizon"] + 1)
    return np.array(delays), early


def poisson_upper(n: int, exposure: float) -> float:
    from scipy.stats import chi2

    return float(chi2.ppf(0.975, 2 * n + 2) / 2 / exposure)


def run(size: str, seed: int) -> tuple[Table, dict[str, Any]]:
    p = PLAN[size]
    t = Table("The channel as a whole (HTTP API, default settings): alarms in control after a bench calibration, "
              f"and delay to the alarm after a 1 s.d. step starting {STEP_AFTER} samples after it",
              ["calibration points", "in control: alarms / samples", "per 100,000 (95% upper)",
               "step: median delay", "p90", "within 100", "alarmed before the step"])
    headline: dict[str, Any] = {}
    with tempfile.TemporaryDirectory() as tmp:
        api = Api(Path(tmp))
        try:
            for points in p["points"]:
                alarms, samples = in_control(api, points, p, seed)
                d, early = step_delays(api, points, p, seed)
                rate = 1e5 * alarms / samples
                upper = 1e5 * poisson_upper(alarms, samples)
                t.add(points, f"{alarms:,} / {samples:,}", f"{rate:.2f} ({upper:.2f})", float(np.median(d)),
                      percentile(d, 90), f"{100 * np.mean(d <= 100):.0f}%", early)
                headline[str(points)] = {"alarms": alarms, "samples": samples, "per_100k": rate,
                                         "median_delay": float(np.median(d)),
                                         "within_100": float(np.mean(d <= 100)), "early": early}
        finally:
            api.close()
    return t, headline
