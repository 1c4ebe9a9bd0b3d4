"""Shared fixtures: a fresh SQLite store per test, an app with an admin key, keys by role."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from service.api import create_app
from service.config import Settings
from service.store.tables import ApiKey, Channel, ChannelState, Event, Sample, Snapshot

ADMIN_SECRET = "ck_test-admin-secret-0123456789abcdef"


@pytest.fixture
def settings(tmp_path: Path) -> Settings:
    return Settings(database_url=f"sqlite:///{tmp_path / 'store.db'}", admin_key=ADMIN_SECRET)


@pytest.fixture
def client(settings: Settings) -> Iterator[TestClient]:
    with TestClient(create_app(settings)) as c:
        yield c


def auth(secret: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {secret}"}


@pytest.fixture
def admin() -> dict[str, str]:
    return auth(ADMIN_SECRET)


@pytest.fixture
def keys(client: TestClient, admin: dict[str, str]) -> dict[str, dict[str, str]]:
    """Headers for each role: admin, technician, device (prefix 'site-a.'), other_device
    (prefix 'site-b.'), revoked (a revoked technician key)."""
    out = {"admin": admin}
    for name, body in [("technician", {"role": "technician"}),
                       ("device", {"role": "device", "prefixes": ["site-a."]}),
                       ("other_device", {"role": "device", "prefixes": ["site-b."]}),
                       ("revoked", {"role": "technician"})]:
        r = client.post("/v1/keys", json=body, headers=admin)
        assert r.status_code == 201, r.text
        out[name] = auth(r.json()["secret"])
        if name == "revoked":
            assert client.delete(f"/v1/keys/{r.json()['id']}", headers=admin).status_code == 200
    return out


def store_fingerprint(client: TestClient) -> dict[str, Any]:
    """Row counts of every table and each channel's (version, n_samples, state): equal
    before and after a failed request means nothing was stored or changed."""
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        s = repo.session
        counts = {t.__tablename__: s.scalar(select(func.count()).select_from(t))
                  for t in (Channel, ChannelState, Sample, Snapshot, Event, ApiKey)}
        states = {pk: (v, n, ms) for pk, v, n, ms in s.execute(
            select(ChannelState.channel_pk, ChannelState.version, ChannelState.n_samples,
                   ChannelState.model_state))}
        configs = {cid: cfg for cid, cfg in s.execute(select(Channel.id, Channel.config))}
    return {"counts": counts, "states": states, "configs": configs}


LINEAR = {"inputs": [{"name": "raw", "unit": "mV", "min": 0.0, "max": 100.0}],
          "output": {"name": "pressure", "unit": "kPa"},
          "basis": {"kind": "poly", "degree": 1}}


@pytest.fixture
def make_channel(client: TestClient, admin: dict[str, str]) -> Any:
    def make(channel_id: str = "site-a.p1", **over: Any) -> dict[str, Any]:
        body = {"id": channel_id, **LINEAR, **over}
        r = client.post("/v1/channels", json=body, headers=admin)
        assert r.status_code == 201, r.text
        return r.json()  # type: ignore[no-any-return]
    return make
