"""Learning-rate schedules for the SGD (LMS) learner.

``t`` counts the steps applied since the channel was created or last calibrated.

- ``constant``:     eta = eta0
- ``inverse_time``: eta = eta0 / (1 + t / tau) ** power
- ``step``:         eta = eta0 * gamma ** floor(t / every)
- ``normalized``:   eta = mu / (eps + |phi|^2), 0 < mu < 2 (normalised LMS: the
  step shrinks the sample's own residual by the factor 1 - mu |phi|^2 / (eps + |phi|^2),
  whatever the scale of phi, which is why it is the safe default)
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .jit import kernel

SCHEDULES = {"constant": 0, "inverse_time": 1, "step": 2, "normalized": 3}

# layout of the schedule parameter vector
SP_ETA0, SP_TAU, SP_POWER, SP_GAMMA, SP_EVERY, SP_MU, SP_EPS = range(7)
SP_SIZE = 7


def schedule_params(cfg: dict[str, Any]) -> tuple[int, NDArray[np.float64]]:
    """(kind code, parameter vector) for a normalised ``learner.schedule`` config."""
    sp = np.zeros(SP_SIZE)
    sp[SP_ETA0] = cfg.get("eta0", 0.0)
    sp[SP_TAU] = cfg.get("tau", 1.0)
    sp[SP_POWER] = cfg.get("power", 1.0)
    sp[SP_GAMMA] = cfg.get("gamma", 1.0)
    sp[SP_EVERY] = cfg.get("every", 1)
    sp[SP_MU] = cfg.get("mu", 0.0)
    sp[SP_EPS] = cfg.get("eps", 0.0)
    return SCHEDULES[cfg["kind"]], sp


@kernel
def eta_at(kind: int, sp: Any, t: float, nrm2: float) -> float:
    """Learning rate for step number t (0-based) with |phi|^2 = nrm2."""
    if kind == 0:
        return float(sp[SP_ETA0])
    if kind == 1:
        return float(sp[SP_ETA0] / (1.0 + t / sp[SP_TAU]) ** sp[SP_POWER])
    if kind == 2:
        return float(sp[SP_ETA0] * sp[SP_GAMMA] ** math.floor(t / sp[SP_EVERY]))
    return float(sp[SP_MU] / (sp[SP_EPS] + nrm2))
