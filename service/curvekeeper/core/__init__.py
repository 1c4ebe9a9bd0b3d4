"""The numeric core: pure computation on numpy arrays, no I/O.

Its public face is ``ChannelModel``; errors are in ``curvekeeper.core.errors``.
"""

from .errors import ConfigError, CoreError, FitError, InputError, StateError
from .model import ChannelModel, LearnResult

__all__ = [
    "ChannelModel",
    "ConfigError",
    "CoreError",
    "FitError",
    "InputError",
    "LearnResult",
    "StateError",
]
