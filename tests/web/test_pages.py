"""The technician's pages, driven in headless Chromium (Playwright for Python, the
system's Chromium; no browser is ever downloaded) against a real server on a loopback
port, with a store filled by the cold-store demo."""

from __future__ import annotations

import os
import socket
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import pytest
from curvekeeper.config import Settings
from curvekeeper.demo.run import run_demo, start_server
from fastapi.testclient import TestClient

# a real browser and server: in the README command, not the quick loop
pytestmark = pytest.mark.slow

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
ADMIN = "ck_web-test-admin-0123456789abcdef"
ROOT = Path(__file__).resolve().parents[2]
SHOTS = ROOT / "artifacts" / "screenshots"
README_SHOT = ROOT / "docs" / "screenshots" / "channel.png"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


# --- without a browser: the pages, their policy and the plotting library's file ------------

def test_the_service_root_leads_to_the_pages(client: TestClient) -> None:
    """``serve`` prints the root address: it must not answer 404."""
    for path in ("/", "/ui"):
        r = client.get(path, follow_redirects=False)
        assert (r.status_code, r.headers["location"]) == (307, "/ui/"), path
    assert client.get("/").status_code == 200  # followed: the sign-in page


def test_pages_and_assets_are_served_with_their_own_policy(client: TestClient) -> None:
    for path in ("/ui/", "/ui/fleet", "/ui/channels/site-a.t1"):
        r = client.get(path)
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html"), path
        csp = r.headers["content-security-policy"]
        assert "script-src 'self';" in csp and "frame-ancestors 'none'" in csp and "unsafe-eval" not in csp
        assert "http" not in csp  # nothing from elsewhere
        assert r.headers["x-frame-options"] == "DENY"
        assert "<script>" not in r.text and "http://" not in r.text and "https://" not in r.text
    js = client.get("/ui/static/vendor/plotly.min.js")
    assert js.status_code == 200 and js.headers["content-type"].startswith("text/javascript")
    import plotly

    shipped = Path(plotly.__file__).parent / "package_data" / "plotly.min.js"
    assert js.content == shipped.read_bytes()
    assert client.get("/ui/static/channel.js").status_code == 200
    assert client.get("/ui/static/nothing.js").status_code == 404
    assert client.get("/ui/static/..%2froutes.py").status_code in (404, 422)
    # the API keeps its strict policy
    assert client.get("/v1/channels").headers["content-security-policy"].startswith("default-src 'none'; frame")


# --- in the browser ---------------------------------------------------------------------------

@dataclass
class Served:
    url: str
    api: httpx.Client


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    db = tmp_path_factory.mktemp("web") / "demo.db"
    run_demo(db=db, port=free_port(), fast=True, keep_running=False, say=lambda _: None)
    port = free_port()
    server, thread = start_server(Settings(database_url=f"sqlite:///{db}", host="127.0.0.1", port=port,
                                           admin_key=ADMIN))
    url = f"http://127.0.0.1:{port}"
    try:
        with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {ADMIN}"}, timeout=30) as api:
            yield Served(url, api)
    finally:
        server.should_exit = True
        thread.join(timeout=10)


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"browser tests need Debian's chromium at {CHROMIUM} (apt-get install chromium)")
    sync_api = pytest.importorskip("playwright.sync_api",
                                   reason="browser tests need playwright (pip install -e '.[browser]')")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        try:
            yield b
        finally:
            b.close()


@dataclass
class Tab:
    page: Any
    outside: list[str]
    problems: list[str]


@pytest.fixture
def tab(browser: Any, served: Served) -> Iterator[Tab]:
    context = browser.new_context(viewport={"width": 1280, "height": 900}, service_workers="block")
    page = context.new_page()
    outside: list[str] = []
    problems: list[str] = []

    def only_here(route: Any) -> None:  # nothing may come from the internet
        if route.request.url.startswith(served.url + "/") or route.request.url.startswith("data:"):
            route.continue_()
        else:
            outside.append(route.request.url)
            route.abort()

    page.route("**/*", only_here)
    page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: problems.append(str(e)))
    try:
        yield Tab(page, outside, problems)
    finally:
        context.close()
    assert outside == [], f"the pages asked for something outside the service: {outside}"
    assert problems == [], f"errors in the browser console (CSP violations included): {problems}"


def wait_rows(page: Any, selector: str, n: int, timeout_s: float = 15.0) -> None:
    """Waits for ``n`` elements (polled from here: the pages' policy forbids the eval that
    Playwright's wait_for_function needs)."""
    deadline = time.monotonic() + timeout_s
    while page.locator(selector).count() != n:
        assert time.monotonic() < deadline, f"{selector}: {page.locator(selector).count()} rows, not {n}"
        page.wait_for_timeout(50)


def sign_in(tab: Tab, served: Served) -> None:
    page = tab.page
    page.goto(served.url + "/ui/")
    page.fill("#key", ADMIN)
    page.click("#signin-button")
    page.wait_for_url(served.url + "/ui/fleet")


def shot(page: Any, name: str) -> None:
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name), full_page=True)


def open_channel(tab: Tab, served: Served, cid: str) -> dict[str, Any]:
    page = tab.page
    page.click(f"a[href='/ui/channels/{cid}']")
    page.wait_for_url(f"{served.url}/ui/channels/{cid}")
    ch: dict[str, Any] = served.api.get(f"/v1/channels/{cid}").json()
    page.wait_for_selector(f"body[data-loaded='{ch['version']}']")
    return ch


def test_sign_in_keeps_the_key_in_session_storage_only(tab: Tab, served: Served) -> None:
    page = tab.page
    page.goto(served.url + "/ui/")
    page.fill("#key", "ck_not-a-key-at-all-000000")
    page.click("#signin-button")
    page.wait_for_selector("#signin-message.error")
    assert "does not know" in page.text_content("#signin-message")
    tab.problems.clear()  # the 401 of the wrong key is logged by the browser, as it should be
    sign_in(tab, served)
    assert page.evaluate("sessionStorage.getItem('curvekeeper.key')") == ADMIN
    assert page.evaluate("localStorage.length") == 0
    assert page.context.cookies() == []
    assert ADMIN not in page.url
    page.click("#signout")
    page.wait_for_url(served.url + "/ui/")
    assert page.evaluate("sessionStorage.getItem('curvekeeper.key')") is None


def test_fleet_lists_channels_needing_attention_first_and_filters(tab: Tab, served: Served) -> None:
    page = tab.page
    sign_in(tab, served)
    page.wait_for_selector("#fleet-table tbody tr")
    channels = served.api.get("/v1/channels").json()["items"]
    rows = page.locator("#fleet-table tbody tr")
    assert rows.count() == len(channels)
    ids = [rows.nth(i).get_attribute("data-channel") for i in range(rows.count())]
    attention = [c["id"] for c in channels
                 if c["drift"]["state"] in ("alarm", "warning") or c["drift"]["tolerance_state"] == "out_of_tolerance"
                 or c["service_state"] == "out_of_service" or c["due_state"] == "overdue" or c["stale"]]
    # the story leaves coldstore.dock.p1 in alarm and out of tolerance, and the faulty probe
    # out of service after its rollback (the rollback test, later in this module, changes them)
    assert "coldstore.produce.p2" in attention and "coldstore.dock.p1" in attention
    assert set(ids[:len(attention)]) == set(attention)
    first = page.locator("#fleet-table tbody tr").first
    assert "degC" in first.text_content()  # rmse and curve change carry their unit
    # a statistic is shown against its alarm level, and a probe out of service says so
    assert " of 12" in first.text_content()
    faulty = page.locator("#fleet-table tbody tr[data-channel='coldstore.produce.p2']")
    assert "out of service" in faulty.text_content()
    assert "updated" in page.text_content("#fleet-summary")
    # each row's forecast column says what the API's forecast says; within the channels not
    # needing attention, the soonest to leave tolerance come first (none: last)
    by_id = {c["id"]: c for c in channels}
    for i, cid in enumerate(ids):
        f = by_id[cid]["forecast"]
        cell = rows.nth(i).locator("small.forecast").text_content()
        if f is None:
            assert cell == "no forecast", (cid, cell)
        elif f["not_within_days"] is not None:
            assert cell.startswith(f"not within {f['not_within_days']} days"), (cid, cell)
        else:
            assert (f["leaves_tolerance_on"] or "not expected")[:10] in cell, (cid, cell)

    def soon(cid: str) -> str:
        f = by_id[cid]["forecast"]
        return (f and f["not_within_days"] is None and (f["leaves_tolerance_on"] or f["low"])) or "9999"

    rest = ids[len(attention):]
    assert [soon(c) for c in rest] == sorted(soon(c) for c in rest)
    shot(page, "fleet.png")

    page.fill("#prefix", "coldstore.chill.")
    page.click("#filters button[type=submit]")
    wait_rows(page, "#fleet-table tbody tr", 2)
    page.fill("#prefix", "")
    page.select_option("#state", "out_of_tolerance")
    moved = [c["id"] for c in channels if c["drift"]["tolerance_state"] == "out_of_tolerance"]
    wait_rows(page, "#fleet-table tbody tr", len(moved))
    assert [rows.nth(i).get_attribute("data-channel") for i in range(rows.count())] == moved


def test_channel_page_draws_the_curve_overlays_a_snapshot_and_rolls_back(tab: Tab, served: Served) -> None:
    page = tab.page
    sign_in(tab, served)
    cid = "coldstore.dock.p1"  # out of tolerance in the story: its curve moved since day 0
    before = open_channel(tab, served, cid)
    # the curve is drawn: SVG paths, the band, the samples, points on the line
    assert page.locator("#curve-plot .scatterlayer .trace path.js-line").count() >= 1
    assert page.locator("#curve-plot .scatterlayer .trace path.js-fill").count() >= 1
    assert page.locator("#curve-plot .scatterlayer .points path").count() > 50
    # the residual history carries the drift statistic of each sample and its thresholds
    stat = page.evaluate("document.getElementById('residual-plot').data"
                         ".filter(t => t.name === 'drift statistic').map(t => t.y.length)")
    assert stat and stat[0] > 50
    n_points = page.evaluate("document.getElementById('curve-plot').data[2].x.length")
    assert n_points == 201
    assert page.locator("#residual-plot .scatterlayer .points path").count() > 50
    assert "degC" in page.text_content("#channel-facts") and "ohm" in page.text_content("#curve-caption")
    assert "does not replace" in page.text_content(".caution")
    # the statistic against its alarm level; an event from a sample at its measurement time,
    # the time the service received it beside it
    assert " of 12 " in page.text_content("#channel-facts")
    alarm = served.api.get(f"/v1/channels/{cid}/events?kind=drift_alarm").json()["items"][0]
    measured = alarm["details"]["measured_at"]
    assert measured[:10] < alarm["at"][:10]  # the story's samples are from weeks before they were sent
    assert "received" in page.locator("#event-table tbody tr[data-kind='drift_alarm']").first.text_content()

    snaps = served.api.get(f"/v1/channels/{cid}/snapshots").json()["items"]
    day0 = next(s for s in snaps if s["reason"] == "calibration")
    page.click(f"#snapshot-table button.overlay[data-snapshot='{day0['id']}']")
    page.wait_for_selector(f"#overlay-result[data-snapshot='{day0['id']}']")
    text = page.text_content("#overlay-result")
    assert "largest difference" in text and "degC" in text and "ohm" in text
    assert page.evaluate("document.getElementById('curve-plot').data.length") == 6
    # the figure is the service's, not one the page computes: the same number, and its text
    # is that number to 3 significant digits, where it is to 4 (the page's CK.num)
    served_snapshot = served.api.get(f"/v1/channels/{cid}/snapshots/{day0['id']}").json()
    diff = served_snapshot["curve_difference"]
    assert diff["max"] == served_snapshot["max_difference_from_current"] and diff["against"] is None
    assert float(page.get_attribute("#overlay-result", "data-max-difference") or "nan") == diff["max"]
    shown, at = text.split("current curve ")[1].split(" degC at ")
    assert float(shown) == float(f"{diff['max']:.3g}")
    assert float(at.split(" ohm")[0]) == float(f"{diff['at']:.4g}")
    shot(page, "channel-overlay.png")
    if not README_SHOT.exists() or os.environ.get("CURVEKEEPER_UPDATE_SCREENSHOTS") == "1":
        README_SHOT.parent.mkdir(parents=True, exist_ok=True)
        page.locator("section.card:has(#curve-plot)").screenshot(path=str(README_SHOT))

    page.click(f"#snapshot-table button.rollback[data-snapshot='{day0['id']}']")
    dialog = page.locator("#rollback-dialog")
    dialog.wait_for(state="visible")
    says = dialog.text_content()
    assert f"snapshot {day0['id']}" in says and f"version becomes {before['version'] + 1}" in says
    assert "does not replace" in says  # the caution where the technician acts
    assert "degC" in says
    shot(page, "rollback-confirm.png")
    page.click("#rollback-cancel")  # cancel changes nothing
    dialog.wait_for(state="hidden")
    assert served.api.get(f"/v1/channels/{cid}").json()["version"] == before["version"]

    page.click(f"#snapshot-table button.rollback[data-snapshot='{day0['id']}']")
    dialog.wait_for(state="visible")
    page.fill("#rollback-reason", "faulty probe: back to the day-0 curve")
    page.click("#rollback-confirm")
    page.wait_for_selector("#page-message.done")
    page.wait_for_selector(f"body[data-loaded='{before['version'] + 1}']")
    after = served.api.get(f"/v1/channels/{cid}").json()
    assert after["version"] == before["version"] + 1
    assert after["drift"]["tolerance_state"] == "ok"
    events = served.api.get(f"/v1/channels/{cid}/events?kind=rollback").json()["items"]
    assert events[-1]["details"]["snapshot"] == day0["id"] and events[-1]["version"] == after["version"]
    assert events[-1]["details"]["reason"] == "faulty probe: back to the day-0 curve"  # the audit trail says why
    assert events[-1]["details"]["set_reference"] is False  # the box was left unticked: the reference stays
    assert page.locator("#event-table tbody tr").first.get_attribute("data-kind") == "rollback"
    shot(page, "channel-after-rollback.png")


def tmp_path_csv(rows: list[str]) -> Path:
    import tempfile

    path = Path(tempfile.mkdtemp(prefix="ck-csv-")) / "bench.csv"
    path.write_text("\n".join(rows) + "\n")
    return path


def test_calibrate_from_pasted_csv(tab: Tab, served: Served) -> None:
    page = tab.page
    sign_in(tab, served)
    cid = "coldstore.chill.p2"
    ref = {"id": "bath.page-ref", "unit": "degC", "expanded_uncertainty": 0.04, "certificate": "PAGE-REF-1",
           "calibrated_on": "2026-01-10", "due_on": "2031-01-10"}
    made = served.api.post("/v1/references", json=ref)
    assert made.status_code in (201, 409), made.text
    before = open_channel(tab, served, cid)
    page.wait_for_selector("#calibrate-reference option[value='bath.page-ref']", state="attached")
    # bench points: the calibration event of day 0 holds the bath readings
    cal = served.api.get(f"/v1/channels/{cid}/events?kind=calibration").json()["items"][0]
    rows = ["raw_ohm,reference_degC", "# bath, day 0"] + [f"{x[0]},{y}" for x, y in cal["details"]["points"]]
    csv_file = tmp_path_csv(rows)
    page.set_input_files("#calibrate-file", str(csv_file))  # a CSV file fills the points
    # poll from here: the page's policy forbids evaluating strings as script in it
    deadline = time.monotonic() + 10
    while "reference_degC" not in page.input_value("#calibrate-csv") and time.monotonic() < deadline:
        page.wait_for_timeout(50)
    assert "reference_degC" in page.input_value("#calibrate-csv")
    page.fill("#calibrate-label", "bench check from the page")
    page.select_option("#calibrate-reference", "bath.page-ref")
    page.fill("#calibrate-conditions", "bath stirred, ambient 21 degC")
    page.fill("#calibrate-reason", "yearly check")
    page.click("#calibrate-button")
    # first a preview: the report is shown and nothing has changed
    page.wait_for_selector("#calibrate-message.preview")
    report = page.text_content("#calibrate-report")
    assert f"{len(cal['details']['points'])}" in report and "degC" in report and "R²" in report
    assert served.api.get(f"/v1/channels/{cid}").json()["version"] == before["version"]
    # the service read the text: the header's names, the terms as the API names them, the
    # residual s.d. in degC with the fitted-space figure beside it
    preview = served.api.post(f"/v1/channels/{cid}/calibrate", json={"csv": csv_file.read_text(),
                                                                     "dry_run": True}).json()
    assert "from raw_ohm, reference from reference_degC" in report
    terms = page.locator("#calibrate-report li[data-term]")
    assert [terms.nth(i).get_attribute("data-term") for i in range(terms.count())] == preview["raw_term_names"]
    sd = page.text_content("#calibrate-report dt:text-is('residual s.d.') + dd") or ""
    assert sd.startswith(f"{preview['residual_sd_output']:.3g} degC") and "fitted reciprocal space" in sd
    assert "does not replace" in page.text_content("#calibrate-caution")  # beside the button that acts
    page.click("#calibrate-apply")
    page.wait_for_selector("#calibrate-message.done")
    page.wait_for_selector(f"body[data-loaded='{before['version'] + 1}']")
    after = served.api.get(f"/v1/channels/{cid}").json()
    assert after["version"] == before["version"] + 1
    events = served.api.get(f"/v1/channels/{cid}/events?kind=calibration").json()["items"]
    assert events[-1]["details"]["label"] == "bench check from the page"
    assert events[-1]["details"]["reason"] == "yearly check"
    record = served.api.get(f"/v1/channels/{cid}/calibrations/{events[-1]['details']['record']}").json()
    assert [r["certificate"] for r in record["references"]] == ["PAGE-REF-1"]
    assert record["conditions"]["note"] == "bath stirred, ambient 21 degC"
    assert events[-1]["details"]["n"] == len(cal["details"]["points"])
    shot(page, "calibrate.png")

    # a header of the user's own names, ';' between fields, columns named on the page
    named = ["step;reference_degC;resistance_ohm", "# bath, day 0"] + [
        f"{i};{y};{x[0]}" for i, (x, y) in enumerate(cal["details"]["points"])]
    page.fill("#calibrate-csv", "\n".join(named))
    page.fill("#calibrate-xcols", "Resistance_Ohm")
    page.fill("#calibrate-ycol", "2")
    page.click("#calibrate-button")
    page.wait_for_selector("#calibrate-message.preview")
    assert "from resistance_ohm, reference from reference_degC" in page.text_content("#calibrate-report")
    assert served.api.get(f"/v1/channels/{cid}").json()["version"] == after["version"]
    page.fill("#calibrate-xcols", "")
    page.fill("#calibrate-ycol", "")

    page.fill("#calibrate-csv", "1000,2\n2000,abc")
    page.click("#calibrate-button")
    page.wait_for_selector("#calibrate-message.error")
    assert "line 2" in page.text_content("#calibrate-message")
    # the service refused the text (422): the browser logs that answer, and nothing else
    assert tab.problems == ["Failed to load resource: the server responded with a status of 422 "
                            "(Unprocessable Entity)"]
    tab.problems.clear()
    assert served.api.get(f"/v1/channels/{cid}").json()["version"] == after["version"]


def test_calibration_history_shows_as_found_as_left_and_verdicts(tab: Tab, served: Served) -> None:
    """A channel calibrated twice more than a year ago: overdue in the fleet (and under its
    filter), and its page lists both records; the newer one shows the first curve as found."""
    from datetime import UTC, datetime, timedelta

    cid = "coldstore.bench.t1"
    made = served.api.post("/v1/channels", json={
        "id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
        "output": {"name": "temperature", "unit": "degC"}, "drift": {"tolerance": 0.5}})
    assert made.status_code == 201, made.text
    ref = served.api.post("/v1/references", json={
        "id": "ref-thermometer-7", "unit": "degC", "expanded_uncertainty": 0.03, "certificate": "T7-2024-118",
        "calibrated_on": "2024-06-01", "due_on": "2031-06-01"})
    assert ref.status_code == 201, ref.text
    xs = [0.0, 20.0, 40.0, 60.0, 80.0, 100.0]
    noise = [0.02, -0.03, 0.01, 0.03, -0.02, -0.01]
    now = datetime.now(UTC)
    ids = []
    for days, offset in ((400, 0.0), (390, -0.3)):  # the second finds the curve 0.3 degC high
        r = served.api.post(f"/v1/channels/{cid}/calibrate", json={
            "points": [{"x": x, "y": -5.0 + offset + 0.2 * x + e} for x, e in zip(xs, noise, strict=True)],
            "at": (now - timedelta(days=days)).isoformat(), "reference": "ref-thermometer-7",
            "conditions": {"values": {"ambient": "20.5 degC"}, "note": "stirred bath"}})
        assert r.status_code == 200, r.text
        ids.append(r.json()["calibration"])
    page = tab.page
    sign_in(tab, served)
    page.wait_for_selector("#fleet-table tbody tr")
    page.select_option("#due-state", "overdue")
    wait_rows(page, "#fleet-table tbody tr", 1)
    row = page.locator("#fleet-table tbody tr").first
    assert row.get_attribute("data-channel") == cid and "overdue" in row.text_content()

    page.goto(f"{served.url}/ui/channels/{cid}")
    ch = served.api.get(f"/v1/channels/{cid}").json()
    page.wait_for_selector(f"body[data-loaded='{ch['version']}']")
    assert "overdue" in page.text_content("#channel-facts") and ch["due_on"] in page.text_content("#channel-facts")
    wait_rows(page, "#calibration-table tbody tr", 2)
    newest = page.locator("#calibration-table tbody tr").first
    assert newest.get_attribute("data-record") == str(ids[1])
    assert "pass" in newest.text_content()  # as found 0.3 degC high: within 0.5 degC
    newest.locator("button").click()
    page.wait_for_selector(f"#calibration-record[data-record='{ids[1]}']")
    wait_rows(page, "#record-as-found tbody tr", len(xs))
    wait_rows(page, "#record-as-left tbody tr", len(xs))
    record = served.api.get(f"/v1/channels/{cid}/calibrations/{ids[1]}").json()
    found = page.locator("#record-as-found tbody tr").first.text_content()
    assert f"{record['as_found'][0]['error']:.3g} degC" in found and "pass" in found
    box = page.text_content("#calibration-record")
    assert "ref-thermometer-7" in box and "ambient = 20.5 degC" in box and "stirred bath" in box
    assert "curve and scatter" in page.text_content("#record-budget")
    assert f"{record['interval_suggestion']['days']} days suggested" in box
    assert "does not replace" in page.text_content("p.caution")  # the caution stays in view
    shot(page, "calibration-record.png")


def test_the_curve_is_drawn_over_the_operating_range_with_switches(tab: Tab, served: Served) -> None:
    page = tab.page
    sign_in(tab, served)
    cid = "coldstore.dock.p1"
    ch = open_channel(tab, served, cid)
    op, inp = ch["operating_range"][0], ch["inputs"][0]
    assert (op["min"], op["max"]) != (inp["min"], inp["max"])  # the samples cover part of the range

    def drawn() -> tuple[float, float]:
        xs = page.evaluate("document.getElementById('curve-plot').data[2].x")
        return xs[0], xs[-1]

    assert page.get_attribute("#curve-plot", "data-over") == "operating"
    assert drawn() == (op["min"], op["max"])  # the service's operating range, as GET answers it
    lo, hi = page.evaluate("document.getElementById('curve-plot').layout.xaxis.range")
    assert lo < op["min"] and hi > op["max"] and hi - lo < 1.1 * (op["max"] - op["min"])
    caption = page.text_content("#curve-caption")
    assert "the operating range" in caption and "the span of the samples" in caption
    assert op["source"] == "samples"
    facts = page.text_content("#channel-facts")
    assert "operating range" in facts and f"{ch['residual_sd_output']:.3g} degC" in facts
    assert "fitted reciprocal space" in facts

    page.check("#curve-whole")
    page.wait_for_selector("#curve-plot[data-over='input']")
    assert drawn() == (inp["min"], inp["max"])
    assert "the whole input range" in page.text_content("#curve-caption")
    page.check("#curve-logx")
    page.wait_for_selector("#curve-plot[data-xaxis='log']")
    assert page.evaluate("document.getElementById('curve-plot').layout.xaxis.type") == "log"
    shot(page, "channel-whole-log.png")
    page.uncheck("#curve-whole")
    page.wait_for_selector("#curve-plot[data-over='operating']")
    assert drawn() == (op["min"], op["max"])


def test_a_page_without_a_key_goes_to_sign_in(tab: Tab, served: Served) -> None:
    tab.page.goto(served.url + "/ui/channels/coldstore.chill.p1")
    tab.page.wait_for_url(served.url + "/ui/")


# --- names and units are text, never markup ------------------------------------------------

HTML_NAMES = {"inputs": [{"name": '<a href="https://example.invalid/x">raw</a>', "unit": "<b>mV</b>",
                          "min": 0, "max": 10}],
              "output": {"name": '<a href="https://example.invalid/y">T</a>', "unit": "<i>degC</i>&amp;"}}


def test_names_and_units_holding_html_are_drawn_as_text(tab: Tab, served: Served) -> None:
    cid = "web.markup.p1"
    r = served.api.post("/v1/channels", json={"id": cid, **HTML_NAMES})
    assert r.status_code == 201, r.text
    r = served.api.post(f"/v1/channels/{cid}/samples",
                        json={"samples": [{"x": float(i), "y": 2.0 * i + 1} for i in range(12)]})
    assert r.status_code == 200, r.text
    page = tab.page
    sign_in(tab, served)
    page.goto(f"{served.url}/ui/channels/{cid}")
    ch = served.api.get(f"/v1/channels/{cid}").json()
    page.wait_for_selector(f"body[data-loaded='{ch['version']}']")
    inp, out = HTML_NAMES["inputs"][0], HTML_NAMES["output"]
    for plot in ("#curve-plot", "#residual-plot"):
        assert page.locator(f"{plot} a").count() == 0, plot  # no link, nor any other element, from a name
        assert page.locator(f"{plot} b, {plot} i").count() == 0, plot
    assert page.text_content("#curve-plot .xtitle") == f"{inp['name']} ({inp['unit']})"
    assert page.text_content("#curve-plot .ytitle") == f"{out['name']} ({out['unit']})"
    assert page.text_content("#residual-plot .ytitle") == f"residual ({out['unit']})"
    assert page.locator("a[href^='https://example.invalid']").count() == 0


# --- the API pages work offline ------------------------------------------------------------

def test_api_docs_load_without_the_internet(tab: Tab, served: Served) -> None:
    page = tab.page  # the tab lets nothing through but the service itself
    page.goto(served.url + "/docs")
    page.wait_for_selector(".opblock-summary", timeout=15_000)
    assert page.locator(".opblock-summary").count() >= 20  # every operation is listed
    assert "/v1/channels/{channel_id}/samples" in page.text_content("#swagger-ui")
    assert "Learn from samples, in order" in page.text_content("#swagger-ui")


def test_the_channel_page_says_its_service_state_and_when_it_went_silent(tab: Tab, served: Served) -> None:
    """A channel expecting a sample every second and given none is stale after 3 s (the
    service tells, on read); its page shows that beside its service state."""
    cid = "coldstore.silent.t9"
    made = served.api.post("/v1/channels", json={
        "id": cid, "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
        "output": {"name": "temperature", "unit": "degC"}, "expected_interval": 1})
    assert made.status_code == 201, made.text
    deadline = time.monotonic() + 20
    while not served.api.get(f"/v1/channels/{cid}").json()["stale"] and time.monotonic() < deadline:
        time.sleep(0.2)
    ch = served.api.get(f"/v1/channels/{cid}").json()
    assert ch["stale"] and ch["service_state"] == "in_service"
    page = tab.page
    sign_in(tab, served)
    page.goto(f"{served.url}/ui/channels/{cid}")
    page.wait_for_selector(f"body[data-loaded='{ch['version']}']")
    facts = page.text_content("#channel-facts") or ""
    assert "in service" in facts and "stale" in facts and "a sample expected every 1 s" in facts
