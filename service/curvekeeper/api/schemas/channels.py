"""Channel schemas. Field rules are checked by the core (``curvekeeper.core.config``),
which names the field and says why a value is wrong."""

from __future__ import annotations

from typing import Any, cast

from pydantic import BaseModel, ConfigDict, Field

from .common import ChannelId, Label

EXAMPLE: dict[str, Any] = {
    "id": "coldroom2.probe07", "description": "thermistor probe, rack 2",
    "inputs": [{"name": "raw", "unit": "ohm", "min": 1000, "max": 40000}],
    "output": {"name": "temperature", "unit": "degC", "transform": "reciprocal", "offset": 273.15},
    "basis": {"kind": "log_poly", "powers": [0, 1, 3]},
    "learner": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.2}},
    "drift": {"detector": "page_hinkley", "tolerance": 0.3},
    "outlier_sd": 6.0, "snapshot_every": 1000,
}


class ChannelCreate(BaseModel):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [cast(Any, EXAMPLE)]})

    id: ChannelId
    description: Label | None = None
    inputs: list[dict[str, Any]] = Field(min_length=1, max_length=8)
    output: dict[str, Any] | None = None
    basis: dict[str, Any] | None = None
    learner: dict[str, Any] | None = None
    drift: dict[str, Any] | None = None
    # numbers are checked by the core, which refuses booleans and says why
    outlier_sd: Any = Field(6.0, description="residual s.d. beyond which a sample is not learned; null: off")
    snapshot_every: Any = Field(1000, description="take a snapshot every N samples; null: off")
    coverage_factor: Any = Field(2.0, description="k of the expanded uncertainty k*u")


class ChannelUpdate(BaseModel):
    """Settings that may change; ``inputs``, ``output`` and ``basis`` are refused with 409."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"drift": {"tolerance": 0.5}, "learner": {"kind": "rls", "forgetting": 0.999}}]})

    description: Label | None = None
    learner: dict[str, Any] | None = None
    drift: dict[str, Any] | None = None
    outlier_sd: Any = None
    snapshot_every: Any = None
    coverage_factor: Any = None
    inputs: Any = None
    output: Any = None
    basis: Any = None
