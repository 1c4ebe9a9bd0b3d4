"""A no-op FastAPI app that parses the same samples body as the service: the baseline
the HTTP benchmark compares with (same server, same client, same body)."""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI

from service.api.schemas.samples import SamplesIn

app = FastAPI()


@app.post("/v1/channels/{channel_id}/samples")
def noop(channel_id: str, body: SamplesIn) -> dict[str, Any]:
    return {"accepted": len(body.samples), "duplicates": 0, "rejected": [], "version": 0}
