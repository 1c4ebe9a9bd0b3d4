"""A no-op FastAPI app that parses the same bodies as the service and answers in the same
shape without any work: the baseline the service benchmark compares with (same server,
same client, same bodies)."""

from __future__ import annotations

from typing import Any

from curvekeeper.api.schemas.curves import PredictIn
from curvekeeper.api.schemas.samples import SamplesIn
from fastapi import FastAPI

app = FastAPI()


@app.post("/v1/channels/{channel_id}/samples")
def noop(channel_id: str, body: SamplesIn) -> dict[str, Any]:
    return {"accepted": len(body.samples), "duplicates": 0, "rejected": [], "version": 0}


@app.post("/v1/channels/{channel_id}/predict")
def noop_predict(channel_id: str, body: PredictIn) -> dict[str, Any]:
    n = len(body.x)
    return {"y": body.x, "u": [0.0] * n, "k": 2.0, "out_of_range": [False] * n, "version": 0, "unit": None}
