"""Shared field types."""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

#: a finite JSON number of sane size (NaN, Infinity and |v| > 1e15 are refused)
Number = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=-1e15, le=1e15)]
ChannelId = Annotated[str, Field(pattern=r"^[a-z0-9._-]{1,128}$", examples=["coldroom2.probe07"])]
Label = Annotated[str, Field(max_length=256)]
Source = Annotated[str, Field(min_length=1, max_length=128, examples=["gw-3"])]
Seq = Annotated[int, Field(strict=True, ge=0, le=2**62)]
