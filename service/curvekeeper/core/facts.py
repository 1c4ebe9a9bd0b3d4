"""What a channel model knows, by name: counts, residual s.d., drift and tolerance state,
quality, summary. Read only; part of ``ChannelModel``."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from .basis import Basis
from .config import Config
from .drift import DS_STATE, STATES, detector_statistic
from .learners import IP_DETECTOR, ST_ACC, ST_FDOF, ST_FVAR, ST_GUARD, ST_HELD, ST_OMS, ST_ON, ST_REJ, ST_RN, ST_RVAR
from .scaling import InputScaler
from .state import ModelState
from .transform import OutputTransform

Array = NDArray[np.float64]

WARMUP = 30  # degrees of freedom behind the residual s.d. before the outlier gate starts
RESIDUAL_WINDOW = 500  # samples: memory of the residual s.d. estimates


class ModelParts:
    """What every part of ``ChannelModel`` may read: its settings, learned state and the
    objects and parameter vectors built from the settings."""

    config: Config
    s: ModelState
    scaler: InputScaler
    basis: Basis
    transform: OutputTransform
    ip: NDArray[np.int64]
    dp: Array
    lp: Array


class ModelFacts(ModelParts):
    """Read-only answers of ``ChannelModel`` about its learned state."""

    if TYPE_CHECKING:  # given by the other parts of ChannelModel
        def residual_sd_output(self) -> float | None: ...
        def operating_range(self) -> tuple[Array, Array, list[str]]: ...

    def residual_sd_dof(self) -> tuple[float | None, float]:
        """(s, dof): the residual s.d. in the fitted space, the last fit's residual variance
        pooled with that of the samples since (counted up to the estimate's window), and
        its degrees of freedom; (None, 0) when there is none yet."""
        st = self.s.st
        n = min(st[ST_RN], RESIDUAL_WINDOW)
        dof = st[ST_FDOF] + n
        if dof <= 0:
            return None, 0.0
        return float(np.sqrt((st[ST_FDOF] * st[ST_FVAR] + n * st[ST_RVAR]) / dof)), float(dof)

    def residual_sd(self) -> float | None:
        return self.residual_sd_dof()[0]

    @property
    def weights(self) -> Array:
        """(M,) current weights, in the basis's scaled space (read only)."""
        w = self.s.w.view()
        w.flags.writeable = False
        return w

    @property
    def n_samples(self) -> int:
        """Samples seen, learned or not."""
        return self.s.n_samples

    @property
    def n_accepted(self) -> int:
        return int(self.s.st[ST_ACC])

    @property
    def n_rejected(self) -> int:
        """Samples not learnt: outliers, guarded (unstable) steps, and those held back (out
        of range, not finite, out of service)."""
        return int(self.s.st[ST_REJ] + self.s.st[ST_GUARD] + self.s.st[ST_HELD])

    @property
    def drift_state(self) -> str:
        """``ok``, ``warning`` or ``alarm`` (an alarm stays until the drift watch restarts)."""
        return STATES[int(self.s.ds[DS_STATE])]

    @property
    def in_alarm(self) -> bool:
        return self.drift_state == "alarm"

    @property
    def drift_statistic(self) -> float:
        """The detector's statistic now, in its own units (compare with warning / alarm)."""
        return float(detector_statistic(int(self.ip[IP_DETECTOR]), self.dp, self.s.ds))

    @property
    def tolerance_state(self) -> str | None:
        """``ok`` / ``out_of_tolerance`` against the reference curve; None without a check."""
        return self.s.tolerance_state

    @property
    def max_curve_change(self) -> float | None:
        """Largest |f_now - f_ref| over the operating range at the last check, output units."""
        return self.s.max_curve_change

    @property
    def rmse(self) -> float | None:
        """Running root mean square of the accepted samples' residuals, output units."""
        return float(np.sqrt(self.s.st[ST_OMS])) if self.s.st[ST_ON] > 0 else None

    @property
    def warmed_up(self) -> bool:
        """The outlier gate works: ``WARMUP`` samples learnt since the start or the last
        calibration."""
        return bool(self.s.st[ST_RN] >= WARMUP)

    @property
    def calibrated(self) -> bool:
        """The channel has a curve: a calibration, or a learnt sample (an RLS learner from
        scratch: its first solution; one switched from SGD keeps the curve it had)."""
        s = self.s
        return s.w_ref is not None or (s.st[ST_ACC] > 0 and (s.info_b is None or bool(np.any(s.w != 0.0))))

    @property
    def service(self) -> str:
        return self.s.service

    def quality(self) -> dict[str, Any]:
        """What a data user should know about every value this model gives."""
        return {"calibrated": self.calibrated, "drift": self.drift_state,
                "tolerance": self.tolerance_state or "ok", "service": self.s.service,
                "warming_up": not self.warmed_up}

    def operating_ranges(self) -> list[dict[str, Any]]:
        """Per input: ``name``, ``min``, ``max`` (input units) and ``source`` of its operating
        range (see ``CurveComparison.operating_range``)."""
        lo, hi, source = self.operating_range()
        return [{"name": spec["name"], "min": float(a), "max": float(b), "source": src}
                for spec, a, b, src in zip(self.config["inputs"], lo, hi, source, strict=True)]

    def summary(self) -> dict[str, Any]:
        """Counts, rmse and residual s.d. (output units; ``residual_sd`` in the fitted space),
        drift state and the operating range for ``GET /v1/channels/{id}``."""
        return {
            "n_samples": self.n_samples,
            "n_accepted": self.n_accepted,
            "n_rejected": self.n_rejected,
            "rmse": self.rmse,
            "residual_sd": self.residual_sd(),
            "residual_sd_output": self.residual_sd_output(),
            "operating_range": self.operating_ranges(),
            "drift": {
                "state": self.drift_state,
                "statistic": self.drift_statistic,
                "warning": self.config["drift"]["warning"],
                "alarm": self.config["drift"]["alarm"],
                "tolerance_state": self.tolerance_state,
                "max_curve_change": self.max_curve_change,
            },
            "warmed_up": self.warmed_up,
        }


