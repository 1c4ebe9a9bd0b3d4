"""The compiled kernels: their cache follows every core module's source, and the warm-up
leaves nothing for a model to compile."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel
from curvekeeper.core import jit as jit_module
from curvekeeper.core.jit import kernel_cache_dir, source_key, specializations
from curvekeeper.kernels import warm_kernels

PACKAGE = Path(jit_module.__file__).parents[1]

# one channel of each basis, transform, learner, schedule and detector the config allows
CHANNELS: list[dict[str, Any]] = [
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}]},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "basis": {"kind": "rbf", "centers": 5}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "basis": {"kind": "hinge", "knots": [0.5]}},
    {"inputs": [{"name": "raw", "min": 1.0, "max": 2.0}], "basis": {"kind": "log_poly"}},
    {"inputs": [{"name": "a", "min": 0.0, "max": 1.0}, {"name": "b", "min": 0.0, "max": 1.0}]},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "output": {"transform": "log"}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "output": {"transform": "reciprocal"}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "learner": {"kind": "rls"}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}],
     "learner": {"kind": "sgd", "schedule": {"kind": "inverse_time", "eta0": 0.1}}, "drift": {"detector": "cusum"}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "drift": {"detector": "ewma"}},
]


def test_after_the_warm_up_no_channel_path_compiles() -> None:
    warm_kernels()
    built = specializations()
    rng = np.random.default_rng(3)
    for body in CHANNELS:
        cfg = channel_config(body)
        d = len(cfg["inputs"])
        lo = cfg["inputs"][0]["min"]
        X = lo + rng.random((40, d))
        y = 2.0 + X.sum(axis=1)
        model = ChannelModel.from_config(cfg)
        model.summary()
        model.learn(X[:1], y[:1])  # a single sample, as most devices send
        model.learn(X, y)
        model.fit_closed_form(X, y)
        model.learn(X[:1].tolist(), y[:1].tolist())
        restored = ChannelModel.from_state(cfg, model.to_state())
        restored.learn(X[:1], y[:1])
        restored.with_settings(channel_config({**body, "learner": {"kind": "rls"}})).learn(X[:1], y[:1])
        restored.summary()
    assert built > 0 and specializations() == built


def test_the_kernels_cache_where_the_session_said_under_the_source_key() -> None:
    where = kernel_cache_dir()
    assert where is not None and where.name == f"kernels-{source_key()}"
    assert where.parent == Path(os.environ["NUMBA_CACHE_DIR"])  # tests/conftest.py: fresh per session


def test_the_source_key_follows_every_core_module(tmp_path: Path) -> None:
    core = shutil.copytree(PACKAGE / "core", tmp_path / "core", ignore=shutil.ignore_patterns("__pycache__"))
    key = source_key(core)
    assert key == source_key(PACKAGE / "core")
    for name in ("drift.py", "schedules.py", "model.py"):
        path = core / name
        text = path.read_text()
        path.write_text(text + "\n")
        assert source_key(core) != key, f"a change to {name} kept the key"
        path.write_text(text)
        assert source_key(core) == key
    (core / "new.py").write_text("X = 1\n")
    assert source_key(core) != key


# a drift statistic after the warm-up, through the compiled learning loop
LEARN = """
import numpy as np
import pytest
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel
m = ChannelModel.from_config(channel_config({"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}]}))
x = np.linspace(0.0, 1.0, 40).reshape(-1, 1)
r = m.learn(x, 1.0 + x[:, 0] + 0.01 * np.sin(np.arange(40.0)))
print(repr(float(r.drift_statistic[-1])))
"""


@pytest.mark.slow
def test_a_changed_callee_module_is_not_served_from_the_cache(tmp_path: Path) -> None:
    """learn_batch (learners.py) has detector_update (drift.py) compiled into it: after a
    change to drift.py alone, a run on the same cache directory must use the new code."""
    src = tmp_path / "src"
    shutil.copytree(PACKAGE, src / "curvekeeper", ignore=shutil.ignore_patterns("__pycache__"))
    env = {**os.environ, "PYTHONPATH": str(src), "NUMBA_CACHE_DIR": str(tmp_path / "cache")}

    def statistic() -> float:
        run = subprocess.run([sys.executable, "-c", LEARN], env=env, capture_output=True, text=True, timeout=600)
        assert run.returncode == 0, run.stderr
        return float(run.stdout)

    before = statistic()
    assert list((tmp_path / "cache").rglob("learners.learn_batch-*.nbi")), "the first run cached nothing"
    drift = src / "curvekeeper" / "core" / "drift.py"
    text = drift.read_text()
    assert text.count("    return stat\n") == 1
    drift.write_text(text.replace("    return stat\n", "    return stat + 1000.0\n"))
    assert statistic() == before + 1000.0
