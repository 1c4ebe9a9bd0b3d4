"""Write the cold-store scenario's data files (the physics is in service/curvekeeper/demo/scenario.py).

Run from the repository root: ``python samples/make_coldstore.py``. Seeded: the files
come out the same every time.
"""

from __future__ import annotations

import csv
import json
from datetime import UTC, datetime, timedelta
from pathlib import Path

from curvekeeper.demo import scenario

HERE = Path(__file__).parent
T0 = datetime(2026, 10, 1, tzinfo=UTC)
SEED = 7


def main() -> None:
    channels = {scenario.channel_id(p): scenario.channel_config(p) for p in scenario.PROBES}
    (HERE / "coldstore_channels.json").write_text(json.dumps(list(channels.values()), indent=1) + "\n")
    bench = {cid: scenario.bench_points(SEED, cid) for cid in channels}
    (HERE / "coldstore_bench.json").write_text(json.dumps(bench, indent=1) + "\n")
    s = scenario.stream(seed=SEED, days=60.0, step_min=30.0)
    keep = (s.day >= 38.0) & (s.day < 42.0)  # four days around the fault
    with (HERE / "coldstore_days38-42.csv").open("w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["channel", "t", "raw_ohm", "reference_degC"])
        for cid, day, raw, ref in zip(s.channel, s.day, s.raw, s.reference, strict=True):
            if 38.0 <= day < 42.0:
                w.writerow([cid, (T0 + timedelta(days=float(day))).isoformat(), f"{raw:.2f}", f"{ref:.3f}"])
    print(f"wrote {len(channels)} channels, bench points, {int(keep.sum())} stream rows")


if __name__ == "__main__":
    main()
