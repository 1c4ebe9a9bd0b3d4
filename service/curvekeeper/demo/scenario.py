"""An invented cold store: eight 10 kohm NTC thermistor probes in four rooms, each next
to a reference thermometer, read every ``step_min`` minutes for ``days`` days.

Physics (all invented, seeded):

- Each probe follows the Steinhart-Hart equation 1/T = A + B ln R + C ln^3 R with the
  widely quoted 10 kohm coefficients, its resistance scaled by a part tolerance
  (s.d. 0.5 %) and its B by s.d. 0.2 %: no real part is nominal, which is why each
  probe gets its own bench calibration on day 0.
- Room air: chill room +2 degC, produce room +8 degC, freezer -22 degC, loading dock
  +4 ... +14 degC, with a daily swing, door openings (short warm spikes) and, in the
  freezer, a defrost cycle every 8 hours. The probe and its reference see the same air.
- Reading noise: 0.02 % of the resistance (the logger's ADC); reference thermometer
  noise 0.02 degC (s.d.).
- Ageing: every probe's resistance creeps by 0.0002 % a day (about 0.015 degC a year,
  well inside the tolerance of 0.15 degC: the forecast says "not within a year"); the
  dock's first probe, by the door, by 0.03 % a day (about 0.4 degC over 60 days), which
  the learner follows and the tolerance check reports; the freezer's second probe,
  strained by the defrost cycles, by 0.01 % a day (about 0.1 degC over 60 days): still
  within tolerance at the end, but its forecast leaves tolerance long before its
  yearly recalibration is due.
- The produce room's second probe takes in moisture on day 40: its resistance drops
  by 0.6 % at once (about +0.13 degC), a fault the drift detector must flag.
- One reading in 500 is a contact glitch: the resistance reads 30 % off.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

SH_A, SH_B, SH_C = 1.129148e-3, 2.34125e-4, 8.76741e-8
ROOMS = {"chill": 2.0, "produce": 8.0, "freezer": -22.0, "dock": 9.0}
PROBES = [f"{room}.p{i}" for room in ROOMS for i in (1, 2)]
SITE = "coldstore"
FAULTY = f"{SITE}.produce.p2"
AGEING = f"{SITE}.dock.p1"
FORECAST = f"{SITE}.freezer.p2"
#: relative resistance creep per day: the ordinary probes', the dock's first and the freezer's second
AGEING_PER_DAY = {"": 2e-6, AGEING: 3e-4, FORECAST: 1e-4}
INTERVAL_DAYS = 365  # every probe's recalibration interval
#: the invented reference thermometer beside the probes (and in the day-0 bath), with an
#: invented certificate: U = 0.02 degC at k = 2
REFERENCE: dict[str, object] = {
    "id": f"{SITE}.ref-thermometer-1", "unit": "degC",
    "description": "reference thermometer: platinum resistance probe with its indicator (invented)",
    "expanded_uncertainty": 0.02, "coverage_factor": 2.0, "certificate": "CS-TH-2026-0917",
    "calibrated_on": "2026-09-14", "due_on": "2027-09-14",
    "note": "invented: calibrated by an invented accredited laboratory against the national temperature scale"}
FAULT_DAY = 40.0
GLITCH_RATE = 1 / 500


def channel_id(probe: str) -> str:
    return f"{SITE}.{probe}"


def channel_config(probe: str) -> dict[str, object]:
    """The channel each probe gets: Steinhart-Hart form, normalised SGD, Page-Hinkley."""
    room = probe.split(".")[0]
    return {
        "id": channel_id(probe),
        "description": f"10 kohm NTC thermistor, {room} room, probe {probe.split('.')[1][1:]}",
        "inputs": [{"name": "raw", "unit": "ohm", "min": 3000, "max": 200000}],
        "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
        "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
        "learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.05}},
        "drift": {"detector": "page_hinkley", "tolerance": 0.15},
        "outlier_sd": 6.0,
        "snapshot_every": 500,
        "recalibration_interval_days": INTERVAL_DAYS,
    }


def resistance_nominal(t_degc: np.ndarray) -> np.ndarray:
    """Nominal 10 kohm NTC resistance (ohm) at t (degC): Steinhart-Hart solved for ln R."""
    target = 1.0 / (np.asarray(t_degc, dtype=np.float64) + 273.15)
    u = np.full_like(target, math.log(10000.0))
    for _ in range(30):
        u -= (SH_A + SH_B * u + SH_C * u**3 - target) / (SH_B + 3 * SH_C * u**2)
    return np.exp(u)


@dataclass
class Probe:
    name: str
    tolerance: float  # relative resistance offset of this part
    beta: float  # relative change of the curve's slope in ln R
    ageing_per_day: float  # relative resistance creep
    fault_day: float | None
    fault_step: float  # relative resistance change at the fault

    def resistance(self, t_degc: np.ndarray, day: np.ndarray) -> np.ndarray:
        """True resistance (ohm) of this probe at air temperature t on the given days."""
        r = resistance_nominal(t_degc)
        ln_r = math.log(10000.0) + (np.log(r) - math.log(10000.0)) * (1 + self.beta)
        factor = (1 + self.tolerance) * (1 + self.ageing_per_day * day)
        if self.fault_day is not None:
            factor = factor * np.where(day >= self.fault_day, 1 + self.fault_step, 1.0)
        return np.asarray(np.exp(ln_r) * factor, dtype=np.float64)


def make_probes(seed: int) -> dict[str, Probe]:
    rng = np.random.default_rng(seed)
    probes = {}
    for p in PROBES:
        cid = channel_id(p)
        probes[cid] = Probe(cid, float(rng.normal(0, 0.005)), float(rng.normal(0, 0.002)),
                            AGEING_PER_DAY.get(cid, AGEING_PER_DAY[""]), FAULT_DAY if cid == FAULTY else None, -0.006)
    return probes


def room_air(room: str, day: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Air temperature (degC) in a room at the given days."""
    base = ROOMS[room]
    hour = (day % 1.0) * 24
    swing = {"chill": 0.6, "produce": 0.8, "freezer": 0.8, "dock": 4.0}[room]
    t = base + swing * np.sin(2 * np.pi * (hour - 9) / 24)
    doors = rng.random(day.size) < (0.08 if room != "freezer" else 0.04)
    t = t + doors * rng.uniform(0.5, 3.0, day.size)
    if room == "freezer":
        t = t + np.where((hour % 8) < 0.5, 6.0, 0.0)
    return t + rng.normal(0, 0.05, day.size)


@dataclass
class Stream:
    """Samples of every probe in time order: channel ids, day, raw ohm, reference degC."""

    channel: list[str]
    day: np.ndarray
    raw: np.ndarray
    reference: np.ndarray


def stream(seed: int = 7, days: float = 60.0, step_min: float = 30.0) -> Stream:
    rng = np.random.default_rng(seed)
    probes = make_probes(seed)
    n = int(days * 24 * 60 / step_min)
    day = np.arange(n) * step_min / (24 * 60)
    parts = []
    for room in ROOMS:
        air = room_air(room, day, rng)
        for i in (1, 2):
            cid = channel_id(f"{room}.p{i}")
            raw = probes[cid].resistance(air, day) * (1 + rng.normal(0, 2e-4, n))
            glitch = rng.random(n) < GLITCH_RATE
            raw = np.where(glitch, raw * rng.choice([0.7, 1.3], n), raw)
            ref = air + rng.normal(0, 0.02, n)
            parts.append((cid, raw, ref))
    # interleave: at each time step, every probe in turn
    channels = [cid for _ in range(n) for cid, _, _ in parts]
    raw = np.stack([p[1] for p in parts], axis=1).reshape(-1)
    ref = np.stack([p[2] for p in parts], axis=1).reshape(-1)
    return Stream(channels, np.repeat(day, len(parts)), raw, ref)


def bench_points(seed: int, probe: str, day: float = 0.0) -> list[dict[str, float]]:
    """A bath calibration of one probe on ``day`` (day 0 by default): 3 readings at each of
    10 set points, x the resistance (ohm), y the reference (degC)."""
    key = [seed, PROBES.index(probe.removeprefix(f"{SITE}."))]
    rng = np.random.default_rng(key + [int(day)] if day else key)  # day 0: the same points as ever
    p = make_probes(seed)[probe]
    points = []
    for bath in (-28.0, -20.0, -10.0, -2.0, 2.0, 6.0, 10.0, 16.0, 25.0, 35.0):
        t = bath + rng.normal(0, 0.01, 3)
        raw = p.resistance(t, np.full(3, day)) * (1 + rng.normal(0, 2e-4, 3))
        ref = t + rng.normal(0, 0.01, 3)
        points += [{"x": round(float(x), 2), "y": round(float(y), 4)} for x, y in zip(raw, ref, strict=True)]
    return points
