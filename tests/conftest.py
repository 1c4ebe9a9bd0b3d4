"""Shared fixtures: a fresh store per test (SQLite, and PostgreSQL when
``CURVEKEEPER_TEST_DATABASE_URL`` names a server), an app with an admin key, keys by role."""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile
from collections.abc import Iterator

# A fresh numba cache per test session, made before curvekeeper's kernels are defined (they
# fix their cache directory then): no run reads machine code another run compiled. Servers
# the tests start inherit it, so the session compiles each kernel once. Kept when given.
if not os.environ.get("NUMBA_CACHE_DIR"):
    os.environ["NUMBA_CACHE_DIR"] = tempfile.mkdtemp(prefix="curvekeeper-numba-")
    atexit.register(shutil.rmtree, os.environ["NUMBA_CACHE_DIR"], ignore_errors=True)
    import numba

    numba.config.reload_config()  # numba may have been imported already (by a plugin)
from pathlib import Path
from typing import Any

import pytest
from curvekeeper.api import create_app
from curvekeeper.config import Settings
from curvekeeper.kernels import PROCESS
from curvekeeper.store import migrate
from curvekeeper.store.engine import make_engine
from curvekeeper.store.tables import (
    ApiKey,
    Base,
    CalibrationRecord,
    Channel,
    ChannelState,
    CurveTrace,
    Event,
    ReferenceInstrument,
    Sample,
    Snapshot,
    Webhook,
    WebhookDelivery,
)
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, func, make_url, select, text

ADMIN_SECRET = "ck_test-admin-secret-0123456789abcdef"


def _database_of_this_worker(url: str | None) -> str | None:
    """The test database, or under pytest-xdist a database of this worker's own next to it
    (made when missing): workers empty their store before every test, so they cannot share
    one. ``.ci/run`` drops them with the run's database."""
    worker = os.environ.get("PYTEST_XDIST_WORKER")
    if not url or not worker:
        return url
    server = make_url(url)
    mine = server.set(database=f"{server.database}_{worker}")
    admin = create_engine(server.set(database="postgres"), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            if conn.scalar(text("SELECT 1 FROM pg_database WHERE datname = :n"), {"n": mine.database}) is None:
                conn.execute(text(f'CREATE DATABASE "{mine.database}"'))
    finally:
        admin.dispose()
    return mine.render_as_string(hide_password=False)


PG_URL = _database_of_this_worker(os.environ.get("CURVEKEEPER_TEST_DATABASE_URL"))
NO_PG = ("PostgreSQL tests need CURVEKEEPER_TEST_DATABASE_URL pointing at a server "
         "(.ci/run starts the local one and sets it)")


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An empty store made by the migrations once; each test gets a copy."""
    path = tmp_path_factory.mktemp("template") / "store.db"
    engine = make_engine(f"sqlite:///{path}")
    migrate.upgrade(engine)
    with engine.connect() as conn:
        conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    engine.dispose()
    return path


@pytest.fixture(scope="session")
def postgres_url() -> Iterator[str]:
    """The test server's database, emptied and migrated once per session."""
    if not PG_URL:
        pytest.skip(NO_PG)
    engine = create_engine(PG_URL)
    with engine.begin() as conn:
        conn.execute(text("DROP SCHEMA public CASCADE"))
        conn.execute(text("CREATE SCHEMA public"))
    migrate.upgrade(engine)
    engine.dispose()
    yield PG_URL


def empty_postgres(url: str) -> None:
    """Every table emptied and every id sequence restarted at 1. DELETE of a few rows is
    much cheaper than TRUNCATE (which rewrites each table's files), and this runs before
    every PostgreSQL test."""
    engine = create_engine(url)
    with engine.begin() as conn:
        for table in reversed(Base.metadata.sorted_tables):
            conn.execute(table.delete())
        sequences = conn.execute(text("SELECT sequence_name FROM information_schema.sequences "
                                      "WHERE sequence_schema = current_schema()")).scalars().all()
        for name in sequences:
            conn.execute(text(f'ALTER SEQUENCE "{name}" RESTART WITH 1'))
    engine.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def database_url(request: pytest.FixtureRequest, tmp_path: Path, sqlite_template: Path) -> str:
    """A fresh, migrated store for one test, on each backend."""
    return fresh_store(request, tmp_path, sqlite_template)


def fresh_store(request: pytest.FixtureRequest, tmp_path: Path, sqlite_template: Path) -> str:
    """A fresh store made by the migrations on the backend named by ``request.param``:
    a copy of the migrated SQLite template, or the emptied PostgreSQL test database
    (skips without CURVEKEEPER_TEST_DATABASE_URL)."""
    if request.param == "sqlite":
        path = tmp_path / "store.db"
        shutil.copyfile(sqlite_template, path)
        return f"sqlite:///{path}"
    url: str = request.getfixturevalue("postgres_url")
    empty_postgres(url)
    return url


@pytest.fixture
def settings(database_url: str, kernels_ready: None) -> Settings:
    # the webhook dispatcher's own passes are off: its queries would run amid a test's own
    # (tests/webhooks drive its passes one at a time)
    return Settings(database_url=database_url, admin_key=ADMIN_SECRET, webhook_dispatch_s=0.0)


@pytest.fixture(scope="session")
def kernels_ready() -> None:
    """This process's compiled kernels, built once: every app after this is ready at once."""
    PROCESS.start()
    assert PROCESS.wait(), PROCESS.error


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
    """Row counts of every table, each channel's (version, n_samples, state), configuration
    and archive time: equal
    before and after a failed request means nothing was stored or changed."""
    store = client.app.state.ctx.store  # type: ignore[attr-defined]
    with store.transaction(write=False) as repo:
        s = repo.session
        counts = {t.__tablename__: s.scalar(select(func.count()).select_from(t))
                  for t in (Channel, ChannelState, Sample, Snapshot, Event, ApiKey, ReferenceInstrument,
                            CalibrationRecord, CurveTrace, Webhook, WebhookDelivery)}
        states = {pk: tuple(rest) for pk, *rest in s.execute(
            select(ChannelState.channel_pk, ChannelState.version, ChannelState.n_samples,
                   ChannelState.model_state, ChannelState.due_on, ChannelState.due_soon_on))}
        configs = {cid: cfg for cid, cfg in s.execute(select(Channel.id, Channel.config))}
        archived = {cid: at for cid, at in s.execute(select(Channel.id, Channel.archived_at))}
        references = {r.id: (r.expanded_uncertainty, r.coverage_factor, r.distribution, r.certificate,
                             r.calibrated_on, r.due_on, r.note, r.retired, r.updated_at)
                      for r in s.scalars(select(ReferenceInstrument))}
    return {"counts": counts, "states": states, "configs": configs, "references": references,
            "archived": archived}


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
