"""The reference instruments page, driven in headless Chromium against a real server (the
fixtures of ``test_pages``): the list with due states, adding one, retiring one."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient

from tests.web.test_pages import Served, Tab, browser, served, sign_in, tab, wait_rows  # noqa: F401

pytestmark = pytest.mark.slow


def test_the_references_page_is_served_with_the_caution(client: TestClient) -> None:
    r = client.get("/ui/references")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    assert "does not replace traceable, accredited" in r.text and "<script>" not in r.text
    csp = r.headers["content-security-policy"]
    assert "script-src 'self';" in csp and "unsafe-eval" not in csp and "http" not in csp
    assert client.get("/ui/static/references.js").status_code == 200


def test_list_add_and_retire_references(tab: Tab, served: Served) -> None:  # noqa: F811
    page = tab.page
    day = datetime.now(UTC).date()
    late = {"id": "web.late", "unit": "degC", "expanded_uncertainty": 0.05, "coverage_factor": 2.0,
            "certificate": "CERT-W1", "calibrated_on": (day - timedelta(days=400)).isoformat(),
            "due_on": (day - timedelta(days=3)).isoformat()}
    assert served.api.post("/v1/references", json=late).status_code == 201
    before = len(served.api.get("/v1/references", params={"retired": "false"}).json()["items"])
    sign_in(tab, served)
    page.click("a[href='/ui/references']")
    page.wait_for_url(served.url + "/ui/references")
    wait_rows(page, "#ref-table tbody tr", before)
    assert "curvekeeper supports calibration work" in page.text_content(".caution")
    first = page.locator("#ref-table tbody tr").first
    assert first.get_attribute("data-reference") == "web.late"  # overdue first
    assert "overdue" in first.text_content()
    # add one stated as the half-width of a rectangular distribution
    page.fill("#ref-id", "web.rect")
    page.fill("#ref-description", "dry-block <b>calibrator</b>")
    page.fill("#ref-unit", "degC")
    page.select_option("#ref-form-kind", "rectangular")
    page.fill("#ref-value", "0.3")
    page.fill("#ref-certificate", "CERT-W2")
    page.fill("#ref-calibrated", (day - timedelta(days=10)).isoformat())
    page.fill("#ref-due", (day + timedelta(days=355)).isoformat())
    page.click("#ref-create")
    page.wait_for_selector("#ref-message.done")
    wait_rows(page, "#ref-table tbody tr", before + 1)
    stored = served.api.get("/v1/references/web.rect").json()
    # GUM 4.3.7: u = a / sqrt 3 = 0.3 / 1.7320508... = 0.17320508...
    assert math.isclose(stored["standard_uncertainty"], 0.17320508075688772, rel_tol=1e-14)
    row = page.locator("tr[data-reference='web.rect']")
    assert "0.1732 degC" in row.text_content() and "rectangular" in row.text_content()
    assert row.locator("b").count() == 0  # the description is text, never markup
    # a bad entry is refused with the service's words and adds nothing
    page.fill("#ref-id", "web.bad")
    page.fill("#ref-unit", "degC")
    page.fill("#ref-value", "0.1")
    page.fill("#ref-certificate", "CERT-W3")
    page.fill("#ref-calibrated", day.isoformat())
    page.fill("#ref-due", (day - timedelta(days=1)).isoformat())
    page.click("#ref-create")
    page.wait_for_selector("#ref-message.error")
    assert "before calibrated_on" in page.text_content("#ref-message")
    tab.problems.clear()  # the browser logs the 422, as it should
    assert served.api.get("/v1/references/web.bad").status_code == 404
    # retire the overdue one
    page.click("button[data-retire='web.late']")
    page.fill("#retire-note", "sent away for recalibration")
    page.click("#retire-confirm")
    wait_rows(page, "#ref-table tbody tr", before)
    got = served.api.get("/v1/references/web.late").json()
    assert got["retired"] is True and got["note"] == "sent away for recalibration"
    page.check("#show-retired")
    wait_rows(page, "#ref-table tbody tr", before + 1)
    assert "retired" in page.locator("tr[data-reference='web.late']").text_content()
