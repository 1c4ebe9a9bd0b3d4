"""The channel configuration as the core takes it: a plain dict, already validated.

The service declares and checks it (``curvekeeper.channel_config``) and passes the
result, every default filled in: ``inputs`` (each ``name``, ``unit``, ``min`` < ``max``),
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
