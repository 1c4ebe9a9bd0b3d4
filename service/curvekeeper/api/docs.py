"""The interactive API page, ``/docs`` (Swagger UI), served with its script and style from
the installed ``fastapi-offline`` package: FastAPI's own page loads them from a public
CDN and stays blank on a network without the internet. There is no ``/redoc``: ReDoc
draws its maker's logo from the internet, which the pages' policy refuses."""

from __future__ import annotations

from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Annotated

from fastapi import APIRouter, FastAPI
from fastapi import Path as PathParam
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import FileResponse, HTMLResponse

from ..errors import NotFound

ASSETS = "/docs/assets"
TYPES = {"swagger-ui-bundle.js": "text/javascript; charset=utf-8", "swagger-ui.css": "text/css; charset=utf-8",
         "favicon.png": "image/png"}


@lru_cache(maxsize=1)
def asset_dir() -> Path:
    """The folder of the installed package's Swagger UI files."""
    path = Path(str(resources.files("fastapi_offline") / "static"))
    missing = [name for name in TYPES if not (path / name).is_file()]
    if missing:  # pragma: no cover - a broken install
        raise RuntimeError(f"the fastapi-offline package lacks {', '.join(missing)} ({path})")
    return path


def install(app: FastAPI, title: str) -> None:
    """Adds ``/docs`` and its assets to ``app`` (made with ``docs_url=None, redoc_url=None``)."""
    asset_dir()  # fail at start-up, not on the first visit, if the package is broken
    router = APIRouter(include_in_schema=False)
    openapi_url = app.openapi_url or "/openapi.json"

    @router.get("/docs")
    def swagger_ui() -> HTMLResponse:
        return get_swagger_ui_html(openapi_url=openapi_url, title=f"{title} - API",
                                   swagger_js_url=f"{ASSETS}/swagger-ui-bundle.js",
                                   swagger_css_url=f"{ASSETS}/swagger-ui.css",
                                   swagger_favicon_url=f"{ASSETS}/favicon.png")

    @router.get(ASSETS + "/{name}")
    def asset(name: Annotated[str, PathParam(max_length=64)]) -> FileResponse:
        if name not in TYPES:
            raise NotFound(f"no asset {name!r}")
        return FileResponse(asset_dir() / name, media_type=TYPES[name],
                            headers={"cache-control": "public, max-age=3600"})

    app.include_router(router)
