"""Routes of the technician's pages under ``/ui/``.

The pages carry no data and no secrets: each is a static HTML file whose script signs in
with an API key kept in the browser's sessionStorage and calls the JSON API with
``Authorization: Bearer``. The plotting library (plotly.js) is served from the installed
``plotly`` package, so nothing is fetched from the internet and no copy lives in this repo.
"""

from __future__ import annotations

from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Annotated

from fastapi import APIRouter
from fastapi import Path as PathParam
from fastapi.responses import FileResponse, HTMLResponse, RedirectResponse, Response

from ..errors import NotFound

router = APIRouter(prefix="/ui", include_in_schema=False)
#: the service's root: the address ``serve`` prints leads to the pages
root = APIRouter(include_in_schema=False)

_HERE = Path(__file__).resolve().parent
STATIC = _HERE / "static"
TEMPLATES = _HERE / "templates"
STATIC_TYPES = {".js": "text/javascript; charset=utf-8", ".css": "text/css; charset=utf-8",
                ".svg": "image/svg+xml"}
# the pages change with the package; a browser asks again (cheaply, by ETag) each time
PAGE_HEADERS = {"cache-control": "no-cache"}
ASSET_HEADERS = {"cache-control": "public, max-age=3600"}


@lru_cache(maxsize=1)
def plotly_js() -> Path:
    """The installed plotly package's ``plotly.min.js``."""
    path = Path(str(resources.files("plotly") / "package_data" / "plotly.min.js"))
    if not path.is_file():  # pragma: no cover - a broken plotly install
        raise RuntimeError(f"plotly.min.js is missing from the plotly package ({path})")
    return path


def _page(name: str) -> HTMLResponse:
    return HTMLResponse((TEMPLATES / name).read_text(encoding="utf-8"), headers=PAGE_HEADERS)


@router.get("")
def ui_root() -> RedirectResponse:
    return RedirectResponse("/ui/", status_code=307)


@root.get("/")
def service_root() -> RedirectResponse:
    return RedirectResponse("/ui/", status_code=307)


@router.get("/")
def sign_in() -> HTMLResponse:
    return _page("signin.html")


@router.get("/fleet")
def fleet() -> HTMLResponse:
    return _page("fleet.html")


@router.get("/references")
def references() -> HTMLResponse:
    return _page("references.html")


@router.get("/channels/{channel_id}")
def channel(channel_id: Annotated[str, PathParam(pattern=r"^[a-z0-9._-]{1,128}$")]) -> HTMLResponse:
    return _page("channel.html")


@router.get("/static/vendor/plotly.min.js")
def plotly_script() -> FileResponse:
    return FileResponse(plotly_js(), media_type=STATIC_TYPES[".js"], headers=ASSET_HEADERS)


@router.get("/static/{name}")
def static_file(name: Annotated[str, PathParam(pattern=r"^[a-z0-9_-]{1,64}\.(js|css|svg)$")]) -> Response:
    path = STATIC / name
    if not path.is_file():
        raise NotFound(f"no static file {name!r}")
    return FileResponse(path, media_type=STATIC_TYPES[path.suffix], headers=ASSET_HEADERS)
