"""Archiving a channel (``POST /v1/channels/{id}/archive`` and ``/unarchive``,
``service/curvekeeper/api/routes/lifecycle.py``) and what an archived channel refuses
(samples, gateway batches, calibrations, rollbacks, settings, snapshots, lifecycle
changes: 409 ``archived``) and still answers (reads).

Unauthorised and bad-input cases first; every failing request is checked for its status,
``error.code`` and an unchanged store (``expect_error``; the store's fingerprint includes
each channel's archive time)."""

from __future__ import annotations

from typing import Any

import pytest
from curvekeeper.cli import main
from fastapi.testclient import TestClient
from sqlalchemy import text

from tests.api.helpers import Cases, Keys, expect_error, ok

CH = "site-a.arch1"
BASE = f"/v1/channels/{CH}"
ARCHIVE = f"{BASE}/archive"
UNARCHIVE = f"{BASE}/unarchive"
POINTS = {"points": [{"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 2.1}, {"x": 100.0, "y": 2.9}]}


def samples(n: int, seq0: int = 0) -> dict[str, Any]:
    return {"source": "rig", "samples": [{"x": float(i), "y": 1.0 + 0.02 * i, "seq": seq0 + i} for i in range(n)]}


@pytest.fixture
def history(client: TestClient, keys: Keys, make_channel: Any) -> dict[str, Any]:
    """A channel with a calibration, 30 samples and a snapshot: a history to keep."""
    make_channel(CH)
    ok(client.post(f"{BASE}/calibrate", json=POINTS, headers=keys["technician"]))
    ok(client.post(f"{BASE}/samples", json=samples(30), headers=keys["device"]))
    snap = ok(client.post(f"{BASE}/snapshots", json={"label": "before retiring"}, headers=keys["technician"]), 201)
    return {"channel": ok(client.get(BASE, headers=keys["technician"])), "snapshot": snap["id"]}


def test_archive_without_a_valid_key_or_role_is_refused(client: TestClient, keys: Keys,
                                                        history: dict[str, Any]) -> None:
    for url in (ARCHIVE, UNARCHIVE):
        expect_error(client, "POST", url, 401, "unauthorized", json={})
        expect_error(client, "POST", url, 401, "unauthorized", headers=keys["revoked"], json={})
        expect_error(client, "POST", url, 403, "forbidden", headers=keys["device"], json={})


def test_archive_bad_input_is_refused(client: TestClient, keys: Keys, history: dict[str, Any]) -> None:
    h = keys["technician"]
    cases = Cases()
    for name, body in [("empty note", {"note": ""}), ("blank note", {"note": "   "}), ("note a number", {"note": 3}),
                       ("note too long", {"note": "x" * 1001}), ("unknown field", {"reason": "old"}),
                       ("a list", [])]:
        with cases.case(name):
            err = expect_error(client, "POST", ARCHIVE, 422, "validation_error", headers=h, json=body)
            assert err["details"][0]["loc"][:2] == ["body", "note"] or name in ("unknown field", "a list"), err
    with cases.case("unknown channel"):
        expect_error(client, "POST", "/v1/channels/site-a.nope/archive", 404, "channel_not_found", headers=h, json={})
    with cases.case("bad channel id"):
        expect_error(client, "POST", "/v1/channels/Site-A/archive", 422, "validation_error", headers=h, json={})
    with cases.case("unarchive a live channel"):
        err = expect_error(client, "POST", UNARCHIVE, 409, "not_archived", headers=h, json={})
        assert "not archived" in err["message"]
    cases.done()


def test_archive_twice_is_409_and_changes_nothing(client: TestClient, keys: Keys, history: dict[str, Any]) -> None:
    h = keys["technician"]
    ok(client.post(ARCHIVE, json={"note": "probe removed"}, headers=h))
    err = expect_error(client, "POST", ARCHIVE, 409, "already_archived", headers=h, json={"note": "again"})
    assert "archived already" in err["message"]


def test_archive_keeps_the_history_and_hides_the_channel(client: TestClient, keys: Keys, admin: dict[str, str],
                                                        history: dict[str, Any], make_channel: Any) -> None:
    h = keys["technician"]
    make_channel("site-a.arch2")
    before = history["channel"]
    assert before["archived"] is False and before["archived_at"] is None
    out = ok(client.post(ARCHIVE, json={"note": "probe removed with the old freezer"}, headers=h))
    assert out["archived"] is True and out["archived_at"] is not None
    # the learned state, its version and the counts are kept
    for field in ("version", "n_samples", "n_rejected", "rmse", "calibrated", "last_sample_at"):
        assert out[field] == before[field], field
    assert ok(client.get(BASE, headers=h)) == out
    # the list leaves it out by default, and shows it when asked
    ids = lambda **q: [c["id"] for c in ok(client.get("/v1/channels", params=q, headers=h))["items"]]  # noqa: E731
    assert ids() == ["site-a.arch2"]
    assert ids(archived="exclude") == ["site-a.arch2"]
    assert ids(archived="include") == [CH, "site-a.arch2"]
    assert ids(archived="only") == [CH]
    assert ids(archived="only", prefix="site-a.arch2") == []
    # paging walks archived channels too
    page = ok(client.get("/v1/channels", params={"archived": "include", "limit": 1}, headers=h))
    assert [c["id"] for c in page["items"]] == [CH] and page["next_cursor"]
    # an event, in the channel's events and the audit trail, with the note and the key
    ev = ok(client.get(f"{BASE}/events", params={"kind": "archived"}, headers=h))["items"]
    assert len(ev) == 1 and ev[0]["details"] == {"note": "probe removed with the old freezer"}
    assert ev[0]["key_id"] is not None and ev[0]["version"] == before["version"]
    audit = ok(client.get("/v1/audit", params={"kind": "archived"}, headers=admin))["items"]
    assert [a["channel"] for a in audit] == [CH]


def test_list_archived_filter_bad_value_is_422(client: TestClient, keys: Keys, history: dict[str, Any]) -> None:
    for value in ("yes", "", "ONLY"):
        expect_error(client, "GET", "/v1/channels", 422, "validation_error", headers=keys["technician"],
                     params={"archived": value})


def test_an_archived_channel_refuses_samples_and_changes(client: TestClient, keys: Keys, make_channel: Any,
                                                        history: dict[str, Any]) -> None:
    h, dev = keys["technician"], keys["device"]
    make_channel("site-a.arch0")
    ok(client.post(ARCHIVE, json={}, headers=h))
    cases = Cases()
    refused: list[tuple[str, str, Any, dict[str, str]]] = [
        ("POST", f"{BASE}/samples", samples(5, 100), dev),
        ("POST", f"{BASE}/calibrate", POINTS, h),
        ("POST", f"{BASE}/calibrate", {**POINTS, "dry_run": True}, h),
        ("POST", f"{BASE}/rollback", {"snapshot": history["snapshot"]}, h),
        ("PATCH", BASE, {"description": "renamed"}, h),
        ("POST", f"{BASE}/snapshots", {"label": "x"}, h),
        ("POST", f"{BASE}/service", {"state": "out_of_service", "note": "repair"}, h),
        ("POST", f"{BASE}/acknowledge", {"note": "checked"}, h),
    ]
    for method, url, body, headers in refused:
        with cases.case(f"{method} {url} {sorted(body)}"):
            err = expect_error(client, method, url, 409, "archived", headers=headers, json=body)
            assert "archived" in err["message"] and err["details"]["archived_at"]
    with cases.case("gateway batch naming the archived channel"):
        body = {"source": "gw", "samples": [{"channel": "site-a.arch0", "x": 1.0, "y": 2.0, "seq": 1},
                                            {"channel": CH, "x": 1.0, "y": 2.0, "seq": 2}]}
        err = expect_error(client, "POST", "/v1/samples", 409, "archived", headers=dev, json=body)
        assert err["details"]["channel"] == CH and err["details"]["index"] == 1
        assert "nothing in this batch was stored" in err["message"]
    cases.done()


def test_an_archived_channel_still_answers_reads(client: TestClient, keys: Keys, history: dict[str, Any]) -> None:
    h = keys["technician"]
    curve = ok(client.get(f"{BASE}/curve", headers=h))
    predicted = ok(client.post(f"{BASE}/predict", json={"x": [10.0, 20.0]}, headers=keys["device"]))
    exported = ok(client.get(f"{BASE}/samples", params={"limit": 1000}, headers=h))
    snaps = ok(client.get(f"{BASE}/snapshots", headers=h))
    ok(client.post(ARCHIVE, json={}, headers=h))
    assert ok(client.get(f"{BASE}/curve", headers=h)) == curve
    assert ok(client.post(f"{BASE}/predict", json={"x": [10.0, 20.0]}, headers=keys["device"])) == predicted
    assert ok(client.get(f"{BASE}/samples", params={"limit": 1000}, headers=h)) == exported
    assert len(exported["items"]) == 30
    assert ok(client.get(f"{BASE}/snapshots", headers=h)) == snaps
    ok(client.get(f"{BASE}/snapshots/{history['snapshot']}", headers=h))
    ok(client.get(f"{BASE}/events", headers=h))


def test_unarchive_brings_the_channel_back(client: TestClient, keys: Keys, history: dict[str, Any]) -> None:
    h = keys["technician"]
    ok(client.post(ARCHIVE, headers=h))  # no body: the note is optional
    back = ok(client.post(UNARCHIVE, json={"note": "probe refitted"}, headers=h))
    assert back["archived"] is False and back["archived_at"] is None
    assert back["n_samples"] == 30 and back["version"] == history["channel"]["version"]
    assert [c["id"] for c in ok(client.get("/v1/channels", headers=h))["items"]] == [CH]
    out = ok(client.post(f"{BASE}/samples", json=samples(5, 100), headers=keys["device"]))
    assert out["n_samples"] == 35
    kinds = [e["kind"] for e in ok(client.get(f"{BASE}/events", headers=h))["items"]]
    assert kinds[-2:] == ["archived", "unarchived"] and kinds.count("unarchived") == 1
    ev = ok(client.get(f"{BASE}/events", params={"kind": "unarchived"}, headers=h))["items"]
    assert ev[0]["details"] == {"note": "probe refitted"}
    ev = ok(client.get(f"{BASE}/events", params={"kind": "archived"}, headers=h))["items"]
    assert ev[0]["details"] == {"note": None}


def test_replay_reads_the_archive_events(client: TestClient, keys: Keys, history: dict[str, Any],
                                         database_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    """Archiving changes no learned state: the replay still reproduces it bit for bit, and
    its check compares the log's last archive event with the channel row."""
    h = keys["technician"]
    ok(client.post(ARCHIVE, json={}, headers=h))
    assert main(["replay", CH, "--check", "--quiet", "--db", database_url]) == 0
    assert "archived" in capsys.readouterr().out
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=True) as repo:  # a channel row the log does not explain
        repo.session.execute(text("UPDATE channel SET archived_at = NULL WHERE id = :cid"), {"cid": CH})
    assert main(["replay", CH, "--check", "--quiet", "--db", database_url]) == 1
    assert "archived differs: stored False, the log says True" in capsys.readouterr().err
    ok(client.post(ARCHIVE, json={}, headers=h))
    ok(client.post(UNARCHIVE, json={}, headers=h))
    assert main(["replay", CH, "--check", "--quiet", "--db", database_url]) == 0


def test_a_channel_is_never_deleted(client: TestClient, keys: Keys, history: dict[str, Any]) -> None:
    """No route deletes a channel: archiving is the way to retire one."""
    err = expect_error(client, "DELETE", BASE, 405, "method_not_allowed", headers=keys["admin"])
    assert "method" in err["message"].lower()
