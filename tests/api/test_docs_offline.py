"""The interactive API page (/docs) loads only from this service: its script and style
come from an installed package, so it works without the internet, and its content
security policy names no other host. /redoc, which needs the internet, is not served."""

from __future__ import annotations

import re
from urllib.parse import urlsplit

from fastapi.testclient import TestClient

ASSET = re.compile(r"""(?:src|href)\s*=\s*["']([^"']+)["']|url\s*:\s*["']([^"']+)["']""")


def _assets(html: str) -> list[str]:
    return [a or b for a, b in ASSET.findall(html)]


def test_docs_pages_use_same_origin_assets_only(client: TestClient) -> None:
    assert client.get("/redoc").status_code == 404
    for page in ("/docs",):
        r = client.get(page)
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html"), page
        assets = _assets(r.text)
        assert assets, page
        assert "http://" not in r.text and "https://" not in r.text, page
        for url in assets:
            parts = urlsplit(url)
            assert not parts.scheme and not parts.netloc and url.startswith("/"), (page, url)
            a = client.get(url)
            assert a.status_code == 200 and len(a.content) > 1000, (page, url, a.status_code)
        csp = r.headers["content-security-policy"]
        assert "http" not in csp and "default-src 'none'" in csp, csp


def test_docs_assets_are_javascript_and_css(client: TestClient) -> None:
    urls = _assets(client.get("/docs").text)
    types = {u.rsplit(".", 1)[-1]: client.get(u).headers["content-type"] for u in urls}
    assert types["js"].startswith("text/javascript") and types["css"].startswith("text/css"), types
