"""GET /healthz and /readyz: live at once, ready once the compiled kernels are built and
the store answers (the store's part: tests/api/test_faults.py)."""

from __future__ import annotations

import threading
from pathlib import Path

from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.kernels import KernelBuild
from fastapi.testclient import TestClient


def gated_build(tmp_path: Path, error: Exception | None = None) -> tuple[KernelBuild, threading.Event]:
    """A build that waits for the returned event, then raises ``error`` if given."""
    release = threading.Event()

    def build() -> None:
        release.wait(60)
        if error is not None:
            raise error

    return KernelBuild(build, cache_dir=tmp_path), release


def test_readyz_answers_503_until_the_kernels_are_built(settings: Settings, tmp_path: Path) -> None:
    kernels, release = gated_build(tmp_path)
    with TestClient(create_app(settings, kernels=kernels)) as c:
        assert c.get("/healthz").json() == {"status": "ok"}
        r = c.get("/readyz")
        assert r.status_code == 503 and r.headers["Retry-After"] == "1"
        assert r.json() == {"error": {"code": "not_ready", "message": "the compiled kernels are still being built",
                                      "details": {"reason": "kernels_building"}}}
        release.set()
        assert kernels.wait(60)
        r = c.get("/readyz")
        assert r.status_code == 200 and r.json() == {"status": "ready"}


def test_readyz_says_why_when_the_build_failed(settings: Settings, tmp_path: Path) -> None:
    kernels, release = gated_build(tmp_path, RuntimeError("no compiler"))
    with TestClient(create_app(settings, kernels=kernels)) as c:
        release.set()
        assert not kernels.wait(60)
        r = c.get("/readyz")
        assert r.status_code == 503 and r.headers["Retry-After"]
        assert r.json()["error"]["code"] == "not_ready"
        assert r.json()["error"]["details"] == {"reason": "kernels_failed", "error": "RuntimeError: no compiler"}
        assert c.get("/healthz").status_code == 200


def test_the_openapi_document_types_healthz_and_readyz(client: TestClient) -> None:
    doc = client.get("/openapi.json").json()
    schemas = doc["components"]["schemas"]

    def answer(path: str, status: str) -> str:
        ref: str = doc["paths"][path]["get"]["responses"][status]["content"]["application/json"]["schema"]["$ref"]
        return ref.rsplit("/", 1)[-1]

    assert schemas[answer("/healthz", "200")]["properties"]["status"]["const"] == "ok"
    assert schemas[answer("/readyz", "200")]["properties"]["status"]["const"] == "ready"
    assert answer("/readyz", "503") == "ErrorBody"
