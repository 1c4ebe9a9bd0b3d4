"""Channel schemas. The configuration is declared once, in ``curvekeeper.channel_config``:
``ChannelCreate`` is that declaration; ``ChannelUpdate`` the settings a PATCH may change
(merged into the stored ones, then checked by the same declaration); ``ChannelPublic``
the configuration with the channel's summary."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from ...channel_config import ChannelConfig, Cusum, Ewma, Integer, PageHinkley, Positive, Text

ChannelCreate = ChannelConfig

Section = Annotated[dict[str, Any], Field(description="fields to change; see the channel body")]


class ChannelUpdate(BaseModel):
    """Settings that may change. ``learner`` of the same kind (``drift`` with the same
    detector) is merged field by field; another kind replaces it. ``inputs``, ``output``
    and ``basis`` fix the curve's form and are refused with 409."""

    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"drift": {"tolerance": 0.5}, "learner": {"kind": "rls", "forgetting": 0.999}}]})

    description: Text | None = None
    learner: Section | None = None
    drift: Section | None = None
    outlier_sd: Annotated[Positive, Field(le=1e6)] | None = None
    snapshot_every: Annotated[Integer, Field(ge=1, le=10**9)] | None = None
    coverage_factor: Annotated[Positive, Field(le=10.0)] | None = None
    inputs: Any = Field(default=None, description="cannot change: 409")
    output: Any = Field(default=None, description="cannot change: 409")
    basis: Any = Field(default=None, description="cannot change: 409")


class DriftStatus(BaseModel):
    """Where the drift watch stands."""

    state: Literal["ok", "warning", "alarm"]
    statistic: float = Field(description="the detector's statistic now (compare with warning and alarm)")
    tolerance_state: Literal["ok", "out_of_tolerance"] | None = Field(
        description="the curve against its reference; null: no tolerance check")
    max_curve_change: float | None = Field(description="largest change from the reference curve at the last "
                                                       "check, output units")


class PageHinkleyPublic(PageHinkley, DriftStatus):
    pass


class CusumPublic(Cusum, DriftStatus):
    pass


class EwmaPublic(Ewma, DriftStatus):
    pass


#: in service the channel learns from its samples; out of service it stores them only
ServiceState = Literal["in_service", "out_of_service"]

DriftPublic = Annotated[PageHinkleyPublic | CusumPublic | EwmaPublic, Field(discriminator="detector")]


class ChannelPublic(ChannelConfig):
    """A channel: its configuration (defaults filled in) and its summary."""

    drift: DriftPublic  # the settings plus the watch's state
    n_samples: int = Field(description="samples stored")
    n_rejected: int = Field(description="samples stored but not learned")
    rmse: float | None = Field(description="running root mean square residual of learned samples, output units")
    residual_sd: float | None = Field(description="residual standard deviation in the fitted space")
    version: int = Field(description="counts every change of the channel's state")
    service_state: ServiceState = Field(description="out_of_service: samples are stored, not learned nor watched")
    last_sample_at: datetime | None
    created_at: datetime


class ChannelPage(BaseModel):
    items: list[ChannelPublic]
    next_cursor: str | None = Field(description="pass as ?cursor= for the next page; null: the last page")
