"""Liveness and readiness answers."""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel


class Liveness(BaseModel):
    """The process answers HTTP (it may still be starting: see ``/readyz``)."""

    status: Literal["ok"] = "ok"


class Readiness(BaseModel):
    """Requests are served without waiting: the compiled kernels are built and the store answers."""

    status: Literal["ready"] = "ready"
