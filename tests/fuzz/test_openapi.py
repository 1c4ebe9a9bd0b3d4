"""Schemathesis against the service's own OpenAPI document, with valid keys: no answer is
a 5xx, and every answer matches what the document says (status, content type, headers,
and the body against the answer's schema, which lists every field); requests that break
the document are refused with a 4xx. A fixed number of examples per operation and a fixed
seed (``derandomize``), so CI runs the same cases."""

from __future__ import annotations

import re
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    allow_header_conformance,
    content_type_conformance,
    ensure_resource_availability,
    ignored_auth,
    missing_required_header,
    negative_data_rejection,
    object_level_authorization,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
    unsupported_method,
    use_after_free,
)

from tests.conftest import ADMIN_SECRET

# hundreds of generated requests: in the README command, not the quick loop
# one worker runs the whole module, in file order: the last test judges what the cases before it saw
pytestmark = [pytest.mark.slow, pytest.mark.xdist_group("openapi-fuzz")]

AUTH = {"Authorization": f"Bearer {ADMIN_SECRET}"}
STORE = Path(tempfile.mkdtemp(prefix="ck-fuzz-")) / "store.db"
# no background tasks: the app is built at collection, and a task's thread beside the schema's
# generation races the warnings filters (not thread-safe)
APP = create_app(Settings(database_url=f"sqlite:///{STORE}", admin_key=ADMIN_SECRET, webhook_dispatch_s=0.0,
                          stale_sweep_s=0.0))
schema = schemathesis.openapi.from_asgi("/openapi.json", APP)

#: every answer is declared: its status, its content type, its headers and its body
ANSWER_CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
                 response_headers_conformance, response_schema_conformance]
#: the built-in checks on requests and resources, all but positive_data_acceptance: the
#: document leaves the finer rules of a channel body (ranges, basis sizes, learner settings)
#: to the core, so a body can fit the document and still get a 422 that names the rule it breaks
REQUEST_CHECKS = [negative_data_rejection, missing_required_header, unsupported_method, allow_header_conformance,
                  use_after_free, ensure_resource_availability, ignored_auth, object_level_authorization]


#: what the fixture made; valid path parameters are pointed at these (see ``aim``)
KNOWN: dict[str, Any] = {"channel_id": "site-a.p1", "snapshot_id": 1, "reference_id": "fuzz.ref"}
#: a channel in drift alarm, for the acknowledge cases alone (the first that passes clears it)
ALARMED = "site-a.alarm"
#: a live channel for the archive cases and an archived one for the unarchive cases (each's
#: first valid case changes it; the others answer 409), so no other operation meets an archived channel
TO_ARCHIVE, ARCHIVED = "site-a.live", "site-a.retired"
#: a spare webhook for the delete cases (the first valid one deletes it), so the others keep theirs
SPARE_WEBHOOK: dict[str, str] = {}
CHANNEL_ID = re.compile(r"^[a-z0-9._-]{1,128}$")
#: status codes each operation answered, to show that every one gave a body to check
ANSWERED: dict[str, set[int]] = {}


@pytest.fixture(scope="module", autouse=True)
def running_app() -> Iterator[None]:
    """Start the app (its store and keys) once, with a channel, samples, a snapshot, a
    calibration and a device key to find."""
    with TestClient(APP) as c:
        body: dict[str, Any] = {"id": "site-a.p1", "inputs": [{"name": "raw", "unit": "mV", "min": 0, "max": 100}],
                                "output": {"unit": "V"}}
        assert c.post("/v1/channels", json=body, headers=AUTH).status_code == 201
        c.post("/v1/channels/site-a.p1/samples", headers=AUTH,
               json={"samples": [{"x": float(i), "y": 2.0 * i + 1} for i in range(50)]})
        assert c.post("/v1/channels/site-a.p1/snapshots", headers=AUTH, json={"label": "fuzz"}).json()["id"] == 1
        # a calibration: a reference curve, so the channel stays calibrated whatever learner a
        # fuzzed PATCH picks (predict answers 409 not_calibrated without a curve)
        assert c.post("/v1/channels/site-a.p1/calibrate", headers=AUTH, json={"points": [
            {"x": 0.0, "y": 1.0}, {"x": 50.0, "y": 101.0}, {"x": 100.0, "y": 201.5}]}).status_code == 200
        KNOWN["kid"] = c.post("/v1/keys", headers=AUTH, json={"role": "device", "label": "fuzz"}).json()["id"]
        assert c.post("/v1/references", headers=AUTH, json={
            "id": KNOWN["reference_id"], "unit": "V", "expanded_uncertainty": 0.01, "certificate": "CERT-F",
            "calibrated_on": "2026-01-05", "due_on": "2036-01-05"}).status_code == 201
        assert c.post("/v1/channels", json={**body, "id": ALARMED}, headers=AUTH).status_code == 201
        c.post(f"/v1/channels/{ALARMED}/calibrate", headers=AUTH,
               json={"points": [{"x": float(x), "y": 1.0 + 0.02 * x + 0.01 * (-1) ** x} for x in range(0, 101, 5)]})
        out = c.post(f"/v1/channels/{ALARMED}/samples", headers=AUTH,
                     json={"samples": [{"x": float(x), "y": 2.0 + 0.02 * x} for x in range(0, 100, 4)]}).json()
        assert out["drift"]["state"] == "alarm", out
        for cid in (TO_ARCHIVE, ARCHIVED):
            assert c.post("/v1/channels", json={**body, "id": cid}, headers=AUTH).status_code == 201
        assert c.post(f"/v1/channels/{ARCHIVED}/archive", json={}, headers=AUTH).status_code == 200
        hook = {"url": "http://10.20.0.5:8080/hooks", "events": ["drift_alarm"], "secret": "fuzz-signing-key-0001"}
        for _ in range(2):
            made = c.post("/v1/webhooks", headers=AUTH, json=hook)
            assert made.status_code == 201, made.text
            SPARE_WEBHOOK.setdefault("wid", made.json()["id"])
        KNOWN["wid"] = made.json()["id"]
        sent = c.post(f"/v1/webhooks/{KNOWN['wid']}/test", headers=AUTH)
        assert sent.status_code == 202, sent.text
        KNOWN["did"] = sent.json()["id"]
        yield


def aim(case: Any) -> None:
    """Point a valid channel id, snapshot id or key id at what the fixture made: a random
    one finds nothing, and a 404 has no answer body to check. An invalid one is left as it
    is, so the cases that must be refused still are. (The key is a spare device key: never
    the admin key the test runs with.)"""
    params = case.path_parameters or {}
    for name, value in params.items():
        low = 1 if name == "did" else -(2**31)  # a delivery id's path says ge=1
        valid = (isinstance(value, str) and CHANNEL_ID.fullmatch(value) is not None
                 and (name != "wid" or len(value) <= 40)) \
            if name not in ("snapshot_id", "did") \
            else isinstance(value, int) and not isinstance(value, bool) and low <= value < 2**31
        if name in KNOWN and valid:
            params[name] = KNOWN[name]
            if name == "wid" and case.method.upper() == "DELETE":
                params[name] = SPARE_WEBHOOK["wid"]
            if name == "channel_id":
                params[name] = next((cid for end, cid in (("/acknowledge", ALARMED), ("/archive", TO_ARCHIVE),
                                                          ("/unarchive", ARCHIVED)) if case.path.endswith(end)),
                                    KNOWN[name])


@schema.parametrize()
@settings(max_examples=25, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
def test_the_api_keeps_its_documented_promises(case: Any) -> None:
    aim(case)
    r = case.call_and_validate(headers=AUTH, checks=ANSWER_CHECKS + REQUEST_CHECKS)
    if case.method.upper() == case.operation.method.upper():  # not one of the probes of other methods
        ANSWERED.setdefault(case.operation.label, set()).add(r.status_code)


def test_every_operation_fuzzed_gave_a_2xx_answer_to_check() -> None:
    # runs after the cases above (pytest keeps file order); alone, it has nothing to judge
    without = sorted(op for op, codes in ANSWERED.items() if not any(200 <= c < 300 for c in codes))
    assert not without, f"no 2xx answer, so no body checked against its schema: {without}"
