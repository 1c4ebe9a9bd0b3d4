"""Errors raised by the numeric core.

The tree::

    CoreError
    ├── ConfigError   a channel configuration is invalid
    ├── InputError    samples or inputs do not fit the channel
    ├── FitError      a closed-form fit cannot be made from the points
    └── StateError    a stored state cannot be restored (the store's fault)
"""

from __future__ import annotations

from typing import Any


class CoreError(Exception):
    """Base of every error the core raises; ``field`` names the offending setting."""

    code = "core_error"

    def __init__(self, message: str, *, field: str | None = None, details: Any = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field
        self.details = details


class ConfigError(CoreError):
    code = "invalid_config"


class InputError(CoreError):
    code = "invalid_sample"


class FitError(CoreError):
    code = "fit_failed"


class StateError(CoreError):
    code = "invalid_state"
