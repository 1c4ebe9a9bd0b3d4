"""``build_kernels``: compile (or load from the cache) every kernel ``ChannelModel`` calls,
with the argument types it calls them with, so no request pays for a compilation."""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from .config import Config
from .model import ChannelModel


def build_kernels(configs: Iterable[Config]) -> None:
    """Run each channel configuration (validated; one input over [0, 1]) through the paths
    the service takes: a new channel's summary, a learn, a closed-form fit, and a model
    restored from its state."""
    x = np.linspace(0.0, 1.0, 4).reshape(-1, 1)
    y = 1.0 + 2.0 * x[:, 0]
    for cfg in configs:
        model = ChannelModel.from_config(cfg)
        model.summary()
        model.learn(x[:1], y[:1])
        model.fit_closed_form(x, y)
        model.learn(x, y)
        restored = ChannelModel.from_state(cfg, model.to_state())
        restored.learn(x[:1], y[:1])
        restored.summary()
