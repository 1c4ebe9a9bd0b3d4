"""A no-op FastAPI app that parses the same bodies as the service and answers in the same
shape without any work: the baseline the service benchmark compares with (same server,
same client, same bodies)."""

from __future__ import annotations

from typing import Any

from curvekeeper.api.schemas.curves import PredictIn
from curvekeeper.api.schemas.samples import SamplesIn
from fastapi import FastAPI
from pydantic import BaseModel

app = FastAPI()


class AnyColumnsIn(BaseModel):
    """A columnar samples body (``tests.bench.ingest_bench.columnar_body``) for a service
    without one: every column a list of numbers, validated as floats, whatever their names."""

    source: str | None = None
    columns: dict[str, list[float]]
    answer: str | None = None


try:  # the service's own columnar schema, as for the row body: the same validation work
    from curvekeeper.api.schemas.samples import ColumnarSamplesIn as ColumnsIn
except ImportError:
    ColumnsIn = AnyColumnsIn  # type: ignore[misc,assignment]


@app.post("/v1/channels/{channel_id}/samples")
def noop(channel_id: str, body: SamplesIn) -> dict[str, Any]:
    return {"accepted": len(body.samples), "duplicates": 0, "rejected": [], "version": 0}


@app.post("/noop/channels/{channel_id}/columns")
def noop_columns(channel_id: str, body: ColumnsIn) -> dict[str, Any]:
    n = len(body.columns.y) if hasattr(body.columns, "y") else max(map(len, body.columns.values()), default=0)
    return {"accepted": n, "duplicates": 0, "rejected": [], "version": 0}


@app.post("/v1/channels/{channel_id}/predict")
def noop_predict(channel_id: str, body: PredictIn) -> dict[str, Any]:
    n = len(body.x)
    return {"y": body.x, "u": [0.0] * n, "k": 2.0, "out_of_range": [False] * n, "version": 0, "unit": None}
