"""``curvekeeper channels create|patch|archive|unarchive`` and ``keys list|revoke`` against a
real service on loopback (``service/curvekeeper/techcli/manage.py``), and ``keys list|revoke
--db`` on its store (``service/curvekeeper/admin.py``)."""

from __future__ import annotations

import io
import json
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
from curvekeeper import display
from curvekeeper.cli import main
from curvekeeper.client import Client, ClientError
from curvekeeper.config import Settings
from curvekeeper.demo.run import start_server

from tests.cli.test_techcli import SECRET, free_port

TOML = """\
# a probe on the dock, degree 2
id = "dock.t1"
description = "dock door probe"
basis = { kind = "poly", degree = 2 }

[[inputs]]
name = "raw"
unit = "mV"
min = 0.0
max = 100.0

[output]
name = "temperature"
unit = "degC"
"""
JSON_BODY = {"id": "dock.t2", "inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
             "output": {"name": "temperature", "unit": "degC"}, "basis": {"kind": "poly", "degree": 8}}


@dataclass
class Service:
    url: str
    db: str


@pytest.fixture(scope="module")
def service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Service]:
    port = free_port()
    db = tmp_path_factory.mktemp("manage") / "s.db"
    server, thread = start_server(Settings(database_url=f"sqlite:///{db}", port=port, admin_key=SECRET))
    try:
        yield Service(f"http://127.0.0.1:{port}", f"sqlite:///{db}")
    finally:
        server.should_exit = True
        thread.join(timeout=10)


@pytest.fixture
def api(service: Service, monkeypatch: pytest.MonkeyPatch) -> Iterator[Client]:
    monkeypatch.setenv("CURVEKEEPER_KEY", SECRET)
    monkeypatch.setenv("CURVEKEEPER_URL", service.url)
    monkeypatch.setattr(sys, "stdin", io.StringIO(""))
    with Client(service.url, SECRET) as c:
        yield c


def missing(api: Client, cid: str) -> bool:
    try:
        api.get_channel(cid)
    except ClientError as exc:
        return exc.status == 404
    return False


def test_create_from_toml_and_json(api: Client, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "t1.toml").write_text(TOML)
    assert main(["channels", "create", "--file", str(tmp_path / "t1.toml")]) == 0
    assert capsys.readouterr().out.strip() == "created channel dock.t1: version 0, 0 samples"
    ch = api.get_channel("dock.t1")
    assert ch["basis"]["degree"] == 2 and ch["description"] == "dock door probe" and ch["inputs"][0]["unit"] == "mV"

    (tmp_path / "t2.JSON").write_text(json.dumps(JSON_BODY, indent=1))
    assert main(["channels", "create", "--file", str(tmp_path / "t2.JSON"), "--json"]) == 0
    out = capsys.readouterr()
    assert json.loads(out.out)["id"] == "dock.t2"
    assert "warning:" in out.err and "degree" in out.err  # the service's warning on a degree above 7


@pytest.mark.parametrize(("name", "text", "words"), [
    ("c.yaml", "id: x\n", "unknown file type '.yaml'; use a .json or .toml file"),
    ("c", "{}", "unknown file type '(no extension)'"),
    ("c.json", '{\n  "id": "dock.x",\n  "inputs": [,]\n}\n', "not valid JSON at line 3, column 14"),
    ("c.toml", 'id = "dock.x"\ninputs = [\nbasis = 3\n', "not valid TOML"),
    ("c.toml", 'id = "dock.x"\nid = "dock.y"\n', "line 2"),
    ("c.json", '[{"id": "dock.x"}]', "must hold one object"),
])
def test_create_refuses_a_bad_file_before_sending(api: Client, tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                   name: str, text: str, words: str) -> None:
    (tmp_path / name).write_text(text)
    assert main(["channels", "create", "--file", str(tmp_path / name)]) == 2
    err = capsys.readouterr().err
    assert words in err and len(err.strip().splitlines()) == 1, err
    assert missing(api, "dock.x")


def test_create_a_missing_file_is_a_local_error(api: Client, tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["channels", "create", "--file", str(tmp_path / "nowhere.toml")]) == 2
    assert "nowhere.toml" in capsys.readouterr().err


def test_create_shows_the_services_validation_in_plain_words(api: Client, tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    body = {**JSON_BODY, "id": "dock.bad", "inputs": [{"name": "raw", "min": 0.0, "max": "high"}],
            "basis": {"kind": "poly", "degree": 99}}
    (tmp_path / "bad.json").write_text(json.dumps(body))
    assert main(["channels", "create", "--file", str(tmp_path / "bad.json")]) == 1
    err = capsys.readouterr().err
    assert "the service refused the request (422 validation_error)" in err
    assert "  inputs[0].max: must be a finite number" in err
    assert "  basis.degree: must be " in err
    assert "constrained" not in err and "body." not in err
    assert missing(api, "dock.bad")


def test_patch_from_a_file(api: Client, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    api.create_channel({**JSON_BODY, "id": "dock.p1", "basis": {"kind": "poly", "degree": 1}})
    (tmp_path / "p.toml").write_text('description = "moved to bay 2"\n[drift]\ntolerance = 0.5\n')
    assert main(["channels", "patch", "dock.p1", "--file", str(tmp_path / "p.toml")]) == 0
    assert capsys.readouterr().out.startswith("changed channel dock.p1: version 1")
    ch = api.get_channel("dock.p1")
    assert ch["description"] == "moved to bay 2" and ch["drift"]["tolerance"] == 0.5
    # null needs JSON; the id, if given, must be the channel's
    (tmp_path / "p.json").write_text('{"id": "dock.p1", "drift": {"tolerance": null}}')
    assert main(["channels", "patch", "dock.p1", "--file", str(tmp_path / "p.json")]) == 0
    assert api.get_channel("dock.p1")["drift"]["tolerance"] is None
    capsys.readouterr()
    (tmp_path / "other.json").write_text('{"id": "dock.p9", "description": "x"}')
    assert main(["channels", "patch", "dock.p1", "--file", str(tmp_path / "other.json")]) == 2
    assert "names channel 'dock.p9', not 'dock.p1'" in capsys.readouterr().err
    (tmp_path / "fixed.json").write_text('{"basis": {"kind": "poly", "degree": 3}}')
    assert main(["channels", "patch", "dock.p1", "--file", str(tmp_path / "fixed.json")]) == 1
    assert "409 immutable_field" in capsys.readouterr().err
    assert api.get_channel("dock.p1")["version"] == 2


def test_archive_and_unarchive(api: Client, capsys: pytest.CaptureFixture[str]) -> None:
    for cid in ("arch.a", "arch.b"):
        api.create_channel({**JSON_BODY, "id": cid, "basis": {"kind": "poly", "degree": 1}})
    assert main(["channels", "archive", "arch.a", "--note", "probe removed"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("archived channel arch.a: version 0, 0 samples, archived 20") and "UTC" in out
    assert main(["channels", "archive", "arch.a"]) == 1
    assert "409 already_archived" in capsys.readouterr().err
    with pytest.raises(ClientError) as exc:
        api.post_samples("arch.a", [{"x": 1.0, "y": 1.0}])
    assert (exc.value.status, exc.value.code) == (409, "archived")

    assert main(["channels", "list", "--prefix", "arch."]) == 0
    assert [line.split()[0] for line in capsys.readouterr().out.splitlines()[1:]] == ["arch.b"]
    assert main(["channels", "list", "--prefix", "arch.", "--archived", "include"]) == 0
    rows = capsys.readouterr().out.splitlines()[1:]
    assert [r.split()[0] for r in rows] == ["arch.b", "arch.a"] and rows[1].split()[1] == "archived(ok)"
    assert main(["channels", "show", "arch.a"]) == 0
    assert "history kept" in capsys.readouterr().out

    assert main(["channels", "unarchive", "arch.a", "--note", "refitted"]) == 0
    assert capsys.readouterr().out.strip() == "unarchived channel arch.a: version 0, 0 samples"
    assert main(["channels", "unarchive", "arch.a"]) == 1
    assert "409 not_archived" in capsys.readouterr().err
    events = api.request("GET", "/v1/channels/arch.a/events")["items"]
    assert [(e["kind"], e["details"]["note"]) for e in events[-2:]] == [("archived", "probe removed"),
                                                                       ("unarchived", "refitted")]


def test_list_order_and_times_follow_the_pages_rule(api: Client, capsys: pytest.CaptureFixture[str]) -> None:
    for cid in ("order.b", "order.a-2", "order.a.1", "order.c"):
        api.create_channel({**JSON_BODY, "id": cid, "basis": {"kind": "poly", "degree": 1}})
    api.request("POST", "/v1/channels/order.c/service", json={"state": "out_of_service", "note": "repair"},
                idempotent=False)
    api.post_samples("order.b", [{"x": 10.0, "y": 10.2, "t": "2026-12-01T10:00:00.900+01:00"}])
    assert main(["channels", "list", "--prefix", "order."]) == 0
    out = capsys.readouterr()
    lines = out.out.splitlines()
    assert lines[0].split() == ["id", "drift", "tolerance", "samples", "rmse", "last", "sample", "(UTC)", "calibration",
                                "due"]
    items = api.request("GET", "/v1/channels?prefix=order.")["items"]
    ids = [line.split()[0] for line in lines[1:]]
    assert ids == [c["id"] for c in display.fleet_order(items)] == ["order.c", "order.a-2", "order.a.1", "order.b"]
    row = next(line for line in lines if line.startswith("order.b"))
    assert row.rstrip().endswith("2026-12-01 09:00:00  -")  # UTC, whole seconds: worked by hand; never calibrated
    assert "1 needing attention" in out.err


def test_keys_list_and_revoke_through_the_service(api: Client, capsys: pytest.CaptureFixture[str],
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    tech = api.request("POST", "/v1/keys", json={"role": "technician", "label": "bench laptop"}, idempotent=False)
    assert main(["keys", "list"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].split() == ["id", "role", "prefixes", "label", "created", "last", "used", "revoked"]
    row = next(line for line in out if line.startswith(tech["id"]))
    assert "bench laptop" in row and row.split()[-2:] == ["never", "-"]  # not used yet, not revoked
    admin_row = next(line for line in out if " admin " in line)
    assert "never" not in admin_row  # the admin key was just used
    assert main(["keys", "list", "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert {k["id"] for k in listed} >= {tech["id"]} and all("secret" not in k for k in listed)

    monkeypatch.setenv("CURVEKEEPER_KEY", tech["secret"])
    assert main(["channels", "list"]) == 0  # the technician key works, and is now used
    assert main(["keys", "list"]) == 1
    assert "403" in capsys.readouterr().err
    monkeypatch.setenv("CURVEKEEPER_KEY", SECRET)
    assert main(["keys", "revoke", tech["id"]]) == 0
    assert capsys.readouterr().out.startswith(f"key {tech['id']} (technician) revoked 20")
    monkeypatch.setenv("CURVEKEEPER_KEY", tech["secret"])
    assert main(["channels", "list"]) == 1
    assert "401" in capsys.readouterr().err
    monkeypatch.setenv("CURVEKEEPER_KEY", SECRET)
    assert main(["keys", "revoke", "../channels"]) == 2
    assert "not a key id" in capsys.readouterr().err
    assert main(["keys", "revoke", "k_0000000000000000"]) == 1
    assert "404 key_not_found" in capsys.readouterr().err


def test_keys_list_and_revoke_on_the_store(api: Client, service: Service,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    dev = api.request("POST", "/v1/keys", json={"role": "device", "prefixes": ["dock."]}, idempotent=False)
    assert main(["keys", "list"]) == 0
    remote = capsys.readouterr().out.splitlines()
    assert main(["keys", "list", "--db", service.db]) == 0
    captured = capsys.readouterr()
    local = captured.out.splitlines()
    assert "keys list: store sqlite:///" in captured.err
    # the same table (a last use may have been written between the two, so that column aside)
    without_use = [[line[:line.index(" ", 0)]] + line.split()[1:-2] for line in remote]
    assert [[line[:line.index(" ", 0)]] + line.split()[1:-2] for line in local] == without_use
    assert any(line.startswith(dev["id"]) and "dock." in line for line in local)

    assert main(["keys", "revoke", dev["id"], "--db", service.db]) == 0
    assert capsys.readouterr().out.startswith(f"key {dev['id']} (device) revoked 20")
    with Client(service.url, dev["secret"], max_retries=0) as c, pytest.raises(ClientError) as exc:
        c.post_samples("dock.t1", [{"x": 1.0, "y": 1.0}])
    assert exc.value.status == 401
    revoked = [e for e in api.request("GET", "/v1/audit?kind=key_revoked")["items"] if e["details"]["id"] == dev["id"]]
    assert len(revoked) == 1
    assert main(["keys", "revoke", "k_0000000000000000", "--db", service.db]) == 1
    assert "no api key" in capsys.readouterr().err
    assert main(["keys", "list", "--db", service.db.replace("s.db", "none.db")]) == 2
