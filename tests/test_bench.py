"""A smoke run of the benchmark suite (tests/bench, tiny sizes), so that the benchmarks
do not rot: every section runs, writes its tables, headline figures and PNG plots, and
the result file holds them. Behaviour only: no timing is asserted here."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from tests.bench.mqtt_bench import broker_reachable

# the whole benchmark suite at smoke size: tens of seconds; in the README command, not the quick loop
pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[1]
# the MQTT section needs the broker (.ci/run starts Mosquitto); without one it is left out
SECTIONS = {"core", "cost", "drift", "service", "ingest"} | ({"mqtt"} if broker_reachable() else set())


@pytest.fixture(scope="module")
def smoke(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    out = tmp_path_factory.mktemp("bench")
    run = subprocess.run([sys.executable, "-m", "tests.bench", "--size", "smoke", "--out", str(out),
                          "--only", ",".join(sorted(SECTIONS))], cwd=ROOT,
                         capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-3000:]
    return out, json.loads((out / "results.json").read_text())


def test_every_section_writes_tables_and_figures(smoke: tuple[Path, dict[str, Any]]) -> None:
    out, result = smoke
    assert set(result["sections"]) == SECTIONS
    assert result["size"] == "smoke" and result["machine"]["cpus"] >= 1
    for name, section in result["sections"].items():
        assert section["tables"], name
        for table in section["tables"]:
            assert table["rows"], f"{name}: {table['title']}"
            assert all(len(row) == len(table["header"]) for row in table["rows"]), table["title"]
        assert section["figures"], name
        for fig in section["figures"]:
            data = (out / fig).read_bytes()
            assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 5_000, fig
    page = (out / "tables.md").read_text()
    for name, section in result["sections"].items():
        assert f"## {name}" in page
        assert all(f"**{t['title']}**" in page for t in section["tables"])


def test_unknown_section_is_refused() -> None:
    run = subprocess.run([sys.executable, "-m", "tests.bench", "--only", "core,nonsense"], cwd=ROOT,
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2 and "nonsense" in run.stderr


def finite(v: Any) -> bool:
    return isinstance(v, int | float) and math.isfinite(v)


def test_core_peers_learn_the_same_curve(smoke: tuple[Path, dict[str, Any]]) -> None:
    h = smoke[1]["sections"]["core"]["headline"]
    for m in (4, 11):
        # every peer ran, and our learners and the peers end near the closed-form optimum:
        # the stream's noise has s.d. 0.01, the truth is smooth
        for key in ("river_sgd_over_ours", "sklearn_sgd_over_ours", "numpy_lms_over_ours", "river_bayes_over_ours_rls",
                    "numpy_rls_over_ours_rls"):
            assert finite(h[f"{key}_m{m}"]) and h[f"{key}_m{m}"] > 0, (key, m)
        assert h[f"rmse_truth_lstsq_m{m}"] < 0.01
        assert h[f"rmse_truth_ours_sgd_m{m}"] < 0.02


def test_cost_slopes_are_fitted(smoke: tuple[Path, dict[str, Any]]) -> None:
    h = smoke[1]["sections"]["cost"]["headline"]
    for key in ("sgd_slope_m", "rls_slope_m", "sgd_overhead_us", "rls_ns_per_term_squared"):
        assert finite(h[key]), key


def test_drift_detectors_find_a_one_sd_step(smoke: tuple[Path, dict[str, Any]]) -> None:
    h = smoke[1]["sections"]["drift"]["headline"]
    for name in ("page_hinkley", "cusum", "ewma"):
        # about 22 samples to an alarm after a sustained 1 s.d. shift at the defaults
        # (service/curvekeeper/core/drift.py; Siegmund's approximation for CUSUM); a small smoke sample
        assert 10 < h[name]["mean_delay"] < 40, (name, h[name])
        assert h[name]["false_alarms_per_10k"] < 5, (name, h[name])
    assert "river ADWIN" in h and "river PageHinkley" in h
    # the channel as a whole through the API: every calibration size ran, in control and stepped
    channel = smoke[1]["sections"]["drift"]["channel"]
    assert set(channel) == {"5", "30"}
    for v in channel.values():
        assert v["samples"] > 0 and v["median_delay"] < 100, v


def test_service_measurements_are_taken(smoke: tuple[Path, dict[str, Any]]) -> None:
    h = smoke[1]["sections"]["service"]["headline"]
    for key in ("ratio_batch1", "ratio_batch1000", "samples_per_s_batch1000", "predict1_p50_ms", "predict10k_p50_ms",
                "channels_ratio_ingest1", "channels_ratio_predict1", "db_bytes_per_channel", "rss_bytes_per_channel"):
        assert finite(h[key]) and h[key] > 0, key


def test_mqtt_and_http_rates_are_measured_on_the_same_batches(smoke: tuple[Path, dict[str, Any]]) -> None:
    if "mqtt" not in SECTIONS:
        pytest.skip("no MQTT broker at 127.0.0.1:1883 (.ci/run starts Mosquitto)")
    section = smoke[1]["sections"]["mqtt"]
    h = section["headline"]
    batches = [row[0] for row in section["tables"][0]["rows"]]
    assert batches == [1, 100]
    for b in batches:
        assert finite(h[f"mqtt_samples_per_s_batch{b}"]) and h[f"mqtt_samples_per_s_batch{b}"] > 0
        assert finite(h[f"http_samples_per_s_batch{b}"]) and h[f"http_samples_per_s_batch{b}"] > 0
    # every sample of both protocols was stored (the section checks the channels' counts)
    assert h["samples_each"] == 1 * 20 + 100 * 4


def test_ingest_targets_are_each_met_missed_or_skipped(smoke: tuple[Path, dict[str, Any]]) -> None:
    from tests.bench.ingest_bench import TARGETS

    section = smoke[1]["sections"]["ingest"]
    h = section["headline"]
    targets = section["tables"][0]
    # one row per target, in the table and the headline, each with its verdict
    assert [row[0] for row in targets["rows"]] == [t[0] for t in TARGETS.values()]
    for key, (_, said, *_) in TARGETS.items():
        entry = h[key]
        assert entry["target"] == said
        if entry["status"] == "skipped":
            # only the columnar body (a server without it) and PostgreSQL (no server) may be skipped, saying why
            assert key in ("columnar_1000", "pg_two_processes") and entry["value"] is None, key
            assert entry["note"].startswith("skipped: ") and len(entry["note"]) > 20, entry
        else:
            assert finite(entry["value"]) and entry["value"] > 0, (key, entry)
            bound, kind = TARGETS[key][2:]
            met = entry["value"] >= bound if kind == "min" else entry["value"] <= bound
            assert entry["status"] == ("met" if met else "missed"), entry
            assert entry["note"], key
    # the columnar measure runs exactly when the server takes the columnar body
    assert (h["columnar_1000"]["status"] != "skipped") == h["columnar_body"]
    # the side-by-side figures are all positive and finite
    side = section["tables"][1]
    assert any(row[0] == "single-sample requests" for row in side["rows"])
    for row in side["rows"]:
        assert all(finite(v) and v > 0 for v in row[1:4]), row
