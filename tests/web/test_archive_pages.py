"""Archived channels on the pages (``web/static/fleet.js``, ``archive.js``) and the display
rule the pages share with the command line (``curvekeeper/display.py`` and ``CK.when`` /
``CK.rank`` in ``web/static/common.js``), in headless Chromium against a real server on a
loopback port with a small store made through the API."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import httpx
import pytest
from curvekeeper import display
from curvekeeper.config import Settings
from curvekeeper.demo.run import start_server

from tests.web.test_pages import ADMIN, Served, Tab, browser, free_port, sign_in, tab, wait_rows

__all__ = ["browser", "tab"]  # the browser fixtures of test_pages, used here too

pytestmark = pytest.mark.slow

LINE = {"inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
        "output": {"name": "pressure", "unit": "kPa"}, "basis": {"kind": "poly", "degree": 1}}
POINTS = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 2.0}, {"x": 100.0, "y": 3.0}]}
# ids whose plain character order differs from a locale's ("-" and "." sort apart from letters there)
IDS = ["plant.a-2", "plant.a.1", "plant.a_3", "plant.ab", "plant.b"]
RETIRED = "plant.a.1"


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    db = tmp_path_factory.mktemp("web-archive") / "store.db"
    port = free_port()
    server, thread = start_server(Settings(database_url=f"sqlite:///{db}", host="127.0.0.1", port=port,
                                           admin_key=ADMIN))
    url = f"http://127.0.0.1:{port}"
    try:
        with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {ADMIN}"}, timeout=30) as api:
            for cid in IDS:
                assert api.post("/v1/channels", json={"id": cid, **LINE}).status_code == 201
                assert api.post(f"/v1/channels/{cid}/calibrate", json=POINTS).status_code == 200
            samples = {"samples": [{"x": 10.0, "y": 1.2, "t": "2026-11-10T01:30:00.75Z"}]}
            assert api.post(f"/v1/channels/{RETIRED}/samples", json=samples).status_code == 200
            assert api.post(f"/v1/channels/{IDS[3]}/service",
                            json={"state": "out_of_service", "note": "repair"}).status_code == 200
            yield Served(url, api)
    finally:
        server.should_exit = True
        thread.join(timeout=10)


def row_ids(page: Any) -> list[str]:
    rows = page.locator("#fleet-table tbody tr")
    return [rows.nth(i).get_attribute("data-channel") for i in range(rows.count())]


def test_fleet_hides_archived_channels_unless_asked(tab: Tab, served: Served) -> None:
    page = tab.page
    assert served.api.post(f"/v1/channels/{RETIRED}/archive", json={"note": "retired"}).status_code == 200
    try:
        sign_in(tab, served)
        wait_rows(page, "#fleet-table tbody tr", len(IDS) - 1)
        live = [c for c in served.api.get("/v1/channels").json()["items"]]
        # the page's order is the command line's (display.fleet_order): out of service first, then by id
        assert row_ids(page) == [c["id"] for c in display.fleet_order(live)] == \
            ["plant.ab", "plant.a-2", "plant.a_3", "plant.b"]
        page.check("#show-archived")
        wait_rows(page, "#fleet-table tbody tr", len(IDS))
        assert row_ids(page)[-1] == RETIRED  # archived: listed last, marked
        row = page.locator(f"#fleet-table tbody tr[data-channel='{RETIRED}']")
        assert "archived" in row.text_content() and row.get_attribute("class") == "archived"
        assert "1 archived" in page.text_content("#fleet-summary")
        # the archived channel's sample time, as the command line writes it
        assert display.when("2026-11-10T01:30:00.75Z") in row.text_content()
        page.uncheck("#show-archived")
        wait_rows(page, "#fleet-table tbody tr", len(IDS) - 1)
    finally:
        served.api.post(f"/v1/channels/{RETIRED}/unarchive", json={})


def test_channel_page_shows_the_archive_banner_and_unarchives(tab: Tab, served: Served) -> None:
    page = tab.page
    assert served.api.post(f"/v1/channels/{RETIRED}/archive", json={}).status_code == 200
    sign_in(tab, served)
    page.goto(f"{served.url}/ui/channels/{RETIRED}")
    page.wait_for_selector("body[data-archived='true']")
    banner = page.locator("#archived-banner")
    assert banner.is_visible() and "Archived" in banner.text_content()
    ch = served.api.get(f"/v1/channels/{RETIRED}").json()
    assert display.when(ch["archived_at"]) in banner.text_content()
    # the actions an archived channel refuses are not offered
    assert not page.locator("#calibrate-button").is_visible()
    assert page.locator("button.rollback").count() >= 1 and not page.locator("button.rollback").first.is_visible()
    assert page.locator(".caution").first.is_visible()
    page.fill("#unarchive-note", "probe refitted")
    page.click("#unarchive-button")
    page.wait_for_selector("body[data-archived='false']")
    assert not banner.is_visible() and page.locator("#calibrate-button").is_visible()
    after = served.api.get(f"/v1/channels/{RETIRED}").json()
    assert after["archived"] is False
    ev = served.api.get(f"/v1/channels/{RETIRED}/events", params={"kind": "unarchived"}).json()["items"]
    assert ev[-1]["details"] == {"note": "probe refitted"}


# the one display rule: the same answers from the page's functions and the command line's
TIMES = ["2026-11-10T01:30:00Z", "2026-11-10T01:30:00.999999Z", "2026-12-31T23:59:59.5+00:00",
         "2026-06-01T02:00:00+02:00", "2026-03-29T01:30:00-05:30", "2026-11-10T01:30:00",
         "2026-11-10T01:30", "not a time"]
CHANNELS: list[dict[str, Any]] = [
    {"id": "b.ok", "drift": {"state": "ok", "tolerance_state": "ok"}, "service_state": "in_service"},
    {"id": "a.ok", "drift": {"state": "ok", "tolerance_state": None}, "service_state": "in_service"},
    {"id": "a-ok", "drift": {"state": "ok", "tolerance_state": None}, "service_state": "in_service"},
    {"id": "c.warn", "drift": {"state": "warning", "tolerance_state": "ok"}, "service_state": "in_service"},
    {"id": "d.tol", "drift": {"state": "warning", "tolerance_state": "out_of_tolerance"},
     "service_state": "in_service"},
    {"id": "e.oos", "drift": {"state": "warning", "tolerance_state": "out_of_tolerance"},
     "service_state": "out_of_service"},
    {"id": "f.alarm", "drift": {"state": "alarm", "tolerance_state": None}, "service_state": "out_of_service"},
    {"id": "g.damaged", "state": "damaged"},
    {"id": "0.gone", "drift": {"state": "alarm"}, "service_state": "in_service", "archived": True},
    {"id": "1.gone", "drift": {"state": "ok"}, "service_state": "in_service", "archived": True},
    {"id": "h.overdue", "drift": {"state": "ok"}, "service_state": "in_service", "due_state": "overdue"},
    {"id": "i.silent", "drift": {"state": "warning", "tolerance_state": "ok"}, "service_state": "in_service",
     "stale": True},
    {"id": "z.soon", "drift": {"state": "ok"}, "forecast": {"leaves_tolerance_on": "2027-04-30", "low": "2027-04-01",
                                                           "not_within_days": None}},
    {"id": "y.later", "drift": {"state": "ok"}, "forecast": {"leaves_tolerance_on": None, "low": "2027-06-01",
                                                            "not_within_days": None}},
    {"id": "x.stable", "drift": {"state": "ok"}, "forecast": {"leaves_tolerance_on": None, "low": None,
                                                             "not_within_days": 365}},
]


def test_the_pages_and_the_command_line_share_one_display_rule(tab: Tab, served: Served) -> None:
    page = tab.page
    sign_in(tab, served)
    shown = page.evaluate("(times) => times.map((t) => CK.when(t))", TIMES)
    assert shown == [display.when(t) for t in TIMES]
    # worked by hand: UTC, whole seconds cut off, an offset taken away, no zone read as UTC
    assert shown[:7] == ["2026-11-10 01:30:00", "2026-11-10 01:30:00", "2026-12-31 23:59:59",
                         "2026-06-01 00:00:00", "2026-03-29 07:00:00", "2026-11-10 01:30:00",
                         "2026-11-10 01:30:00"]
    assert shown[7] == "not a time"
    order = page.evaluate("(items) => items.slice().sort(CK.byRank).map((c) => c.id)", CHANNELS)
    assert order == [c["id"] for c in display.fleet_order(CHANNELS)]
    assert order == ["g.damaged", "f.alarm", "e.oos", "d.tol", "i.silent", "c.warn", "h.overdue", "z.soon",
                     "y.later", "a-ok", "a.ok", "b.ok", "x.stable", "0.gone", "1.gone"]
    ranks = page.evaluate("(items) => items.map((c) => CK.rank(c))", CHANNELS)
    assert ranks == [display.rank(c) for c in CHANNELS]
    assert page.evaluate("() => [CK.badge('stale').textContent, CK.badge('stale').className]") == \
        ["stale", "state state-stale"]
