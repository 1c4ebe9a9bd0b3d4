"""``build_kernels``: compile (or load from the cache) every kernel ``ChannelModel`` calls,
with the argument types it calls them with, so no request pays for a compilation."""

from __future__ import annotations

import numpy as np

from .model import ChannelModel

# the smallest channel of each learner: the kernels' types do not depend on the basis,
# the transform, the schedule or the detector (those are runtime codes and array sizes)
_CHANNELS = (
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "learner": {"kind": "sgd"}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "learner": {"kind": "rls"}},
)


def build_kernels() -> None:
    """Run each learner through the paths the service takes: a new channel's summary,
    a learn, a closed-form fit, and a model restored from its state."""
    x = np.linspace(0.0, 1.0, 4).reshape(-1, 1)
    y = 1.0 + 2.0 * x[:, 0]
    for cfg in _CHANNELS:
        model = ChannelModel.from_config(cfg)
        model.summary()
        model.learn(x[:1], y[:1])
        model.fit_closed_form(x, y)
        model.learn(x, y)
        restored = ChannelModel.from_state(model.to_state())
        restored.learn(x[:1], y[:1])
        restored.summary()
