"""The channel configuration as the core takes it: a plain dict, already validated.

The service declares and checks it (``curvekeeper.channel_config``) and passes the
result, every default filled in: ``inputs`` (each ``name``, ``unit``, ``min`` < ``max``, and
``operating_range`` [lo, hi] inside them or null),
``output`` (``transform``, ``offset``), ``basis`` (by ``kind``; rbf centres as points),
``learner`` (``sgd`` with a ``schedule``, or ``rls``), ``drift`` (``detector`` and its
thresholds, ``tolerance``), ``outlier_sd``, ``snapshot_every``, ``coverage``,
``coverage_factor`` (null: k from Student's t), ``reference`` (the reference instrument's
``expanded_uncertainty``, ``coverage_factor`` and ``distribution``, the ``instrument`` they
were taken from, or null), ``range_margin``, ``require_reference`` (the service's rule that
samples name their reference instrument; the core does not read it),
``decision_rule`` (``simple`` | ``guarded``), ``recalibration_interval_days``, ``due_soon_days``,
``expected_interval`` (seconds between samples; the service's silence watch, the core does not read it).
The core reads it and never changes it.
"""

from __future__ import annotations

from typing import Any

#: a channel's configuration, validated (see the module docstring)
Config = dict[str, Any]

#: settings a channel may change after creation; the rest (inputs with their resolution,
#: output, basis) fix the curve's form
MUTABLE = frozenset({"description", "learner", "drift", "outlier_sd", "snapshot_every", "coverage",
                     "coverage_factor", "reference", "range_margin", "require_reference", "decision_rule",
                     "recalibration_interval_days", "due_soon_days", "expected_interval"})


def curve_form(config: Config) -> Config:
    """The settings that fix the curve's form: all but the ``MUTABLE`` ones, each input
    without its ``operating_range`` (which says only where the curve is compared and drawn)."""
    out = {k: v for k, v in config.items() if k not in MUTABLE}
    if "inputs" in out:
        out["inputs"] = [{k: v for k, v in i.items() if k != "operating_range"} for i in out["inputs"]]
    return out


def adopt_settings(config: Config, source: Config) -> Config:
    """``config`` with the settings ``source`` may change: the ``MUTABLE`` ones and each
    input's ``operating_range`` (both configurations have the same inputs)."""
    out = {**config, **{k: source[k] for k in MUTABLE if k in source}}
    out["inputs"] = [{**mine, "operating_range": theirs.get("operating_range")} if "operating_range" in theirs
                     or "operating_range" in mine else mine
                     for mine, theirs in zip(config["inputs"], source["inputs"], strict=True)]
    return out
