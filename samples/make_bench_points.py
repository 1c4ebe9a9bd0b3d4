"""Generate the bench-calibration example: a 10 kohm NTC thermistor probe of a cold
store, checked in a stirred bath against a reference thermometer.

Invented data. The probe follows the Steinhart-Hart equation with coefficients a
little off the nominal 10 kohm set (a real part is never nominal); the reference
thermometer reads the bath to 0.01 degC (s.d.); the probe's resistance reading has
0.02 % noise. Run: ``python samples/make_bench_points.py > samples/thermistor_bench_points.json``.
"""

from __future__ import annotations

import json
import math
import random

A, B, C = 1.1292e-3, 2.3410e-4, 8.7750e-8  # this probe's own coefficients (1/T in 1/K, R in ohm)


def resistance(t_degc: float) -> float:
    """Invert 1/T = A + B ln R + C ln^3 R for R by Newton's method."""
    target = 1.0 / (t_degc + 273.15)
    u = math.log(10000.0)
    for _ in range(50):
        f = A + B * u + C * u**3 - target
        u -= f / (B + 3 * C * u**2)
    return math.exp(u)


def main() -> None:
    rng = random.Random(20261201)
    points = []
    for bath in (-2.0, 0.0, 2.0, 4.0, 8.0, 12.0, 18.0, 25.0, 32.0, 40.0, 50.0):
        for _ in range(3):
            true_t = bath + rng.gauss(0, 0.02)
            reading = resistance(true_t) * (1 + rng.gauss(0, 2e-4))
            reference = true_t + rng.gauss(0, 0.01)
            points.append({"x": round(reading, 1), "y": round(reference, 3)})
    print(json.dumps({"points": points, "label": "bath calibration, probe 07"}, indent=1))


if __name__ == "__main__":
    main()
