"""Web safety: security headers, CORS closed unless configured, no key in a URL."""

from __future__ import annotations

from curvekeeper.api import create_app
from curvekeeper.config import Settings
from fastapi.testclient import TestClient


def test_security_headers_on_api_answers_and_html_pages(client: TestClient, admin: dict[str, str]) -> None:
    r = client.get("/v1/channels", headers=admin)
    assert r.headers["x-content-type-options"] == "nosniff"
    assert r.headers["x-frame-options"] == "DENY"
    assert r.headers["referrer-policy"] == "no-referrer"
    assert r.headers["cache-control"] == "no-store"
    assert r.headers["content-security-policy"].startswith("default-src 'none'")
    page = client.get("/docs")
    assert page.headers["content-type"].startswith("text/html")
    csp = page.headers["content-security-policy"]
    assert "frame-ancestors 'none'" in csp and "default-src 'none'" in csp
    # errors carry them too
    assert client.get("/v1/channels").headers["x-frame-options"] == "DENY"


def test_cors_is_closed_by_default(client: TestClient, admin: dict[str, str]) -> None:
    r = client.options("/v1/channels", headers={"Origin": "https://elsewhere.example",
                                                "Access-Control-Request-Method": "GET"})
    assert "access-control-allow-origin" not in r.headers
    r = client.get("/v1/channels", headers={**admin, "Origin": "https://elsewhere.example"})
    assert r.status_code == 200 and "access-control-allow-origin" not in r.headers


def test_cors_opens_for_configured_origins_only(settings: Settings, admin: dict[str, str]) -> None:
    app = create_app(settings.with_(cors_origins="https://ops.example.org, https://lab.example.org"))
    with TestClient(app) as c:
        pre = c.options("/v1/channels", headers={"Origin": "https://ops.example.org",
                                                 "Access-Control-Request-Method": "GET",
                                                 "Access-Control-Request-Headers": "authorization"})
        assert pre.status_code == 200
        assert pre.headers["access-control-allow-origin"] == "https://ops.example.org"
        other = c.options("/v1/channels", headers={"Origin": "https://elsewhere.example",
                                                   "Access-Control-Request-Method": "GET"})
        assert "access-control-allow-origin" not in other.headers


def test_a_key_in_the_url_is_not_a_key(client: TestClient, admin: dict[str, str]) -> None:
    secret = admin["Authorization"].split(" ", 1)[1]
    for query in (f"?key={secret}", f"?api_key={secret}", f"?token={secret}", f"?authorization=Bearer%20{secret}"):
        r = client.get("/v1/channels" + query)
        assert r.status_code == 401, query


def test_method_not_allowed_lists_every_method_of_the_path(client: TestClient, admin: dict[str, str]) -> None:
    # regression: the fuzzer found the Allow header naming only the first route's methods
    r = client.request("OPTIONS", "/v1/channels", headers=admin)
    assert r.status_code == 405 and r.json()["error"]["code"] == "method_not_allowed"
    assert r.headers["allow"] == "GET, POST"
    r = client.request("PUT", "/v1/channels/site-a.x", headers=admin)
    assert r.status_code == 405 and r.headers["allow"] == "GET, PATCH"
