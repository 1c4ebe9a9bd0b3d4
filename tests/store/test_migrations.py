"""The schema comes from the migrations, and equals the tables the code declares."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import uuid
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from curvekeeper.actions import channels
from curvekeeper.actions.unit import Work
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel
from curvekeeper.store import Store, migrate
from curvekeeper.store.engine import make_engine
from curvekeeper.store.tables import Base, Channel, ChannelState, Snapshot, UTCDateTime
from sqlalchemy import JSON, Engine, column, create_engine, insert, select, table, text
from sqlalchemy.engine import make_url


@pytest.fixture(params=["sqlite", "postgresql"])
def empty_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty database on each backend (PostgreSQL: a new database, dropped afterwards)."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'empty.db'}"
        return
    server = os.environ.get("CURVEKEEPER_TEST_DATABASE_URL")
    if not server:
        pytest.skip("PostgreSQL tests need CURVEKEEPER_TEST_DATABASE_URL pointing at a server")
    name = f"ck_mig_{uuid.uuid4().hex[:12]}"
    admin = create_engine(make_url(server).set(database="postgres"), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f"CREATE DATABASE {name}"))
    try:
        yield make_url(server).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
        admin.dispose()


def test_migrations_from_empty_give_the_declared_schema(empty_url: str) -> None:
    engine = make_engine(empty_url)
    try:
        migrate.upgrade(engine)
        assert migrate.current_revision(engine) == migrate.head_revision(engine)
        # the constant a starting service compares with, without reading the scripts
        assert migrate.HEAD == migrate.head_revision(engine) == migrate.stored_revision(engine)
        with engine.connect() as conn:
            diffs = compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}),
                                     Base.metadata)
        assert diffs == []
    finally:
        engine.dispose()


def test_a_new_store_is_migrated_on_start_and_an_old_one_is_refused(empty_url: str) -> None:
    store = Store(empty_url)  # what `curvekeeper serve` does: an empty store gets the schema
    assert migrate.current_revision(store.engine) == migrate.head_revision(store.engine)
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '0000'"))
    store.dispose()
    with pytest.raises(migrate.SchemaError, match="db upgrade"):
        Store(empty_url)


def test_tables_made_outside_the_migrations_are_refused(empty_url: str) -> None:
    engine = make_engine(empty_url)
    Base.metadata.create_all(engine)
    try:
        with pytest.raises(migrate.SchemaError, match="no migration history"):
            migrate.prepare(engine)
    finally:
        engine.dispose()


def test_0004_moves_the_config_out_of_the_model_states(empty_url: str) -> None:
    """A store at 0003 keeps the config inside every model state (format 1); after 0004 the
    channel row has it once, the states do not, a snapshot keeps its own in its column, and
    the channel loads and learns as before. Downgrading puts it back."""
    config = channel_config({"id": "site-a.p1", "inputs": [{"name": "raw", "min": 0, "max": 100}],
                             "drift": {"detector": "cusum", "tolerance": 0.5}})
    config = _as_before_0005(config)
    model = ChannelModel.from_config(config)
    x = np.linspace(0.0, 100.0, 60)
    model.learn(x, 2.0 * x + 1.0)
    current = model.to_state()
    state = _as_format_2(current)
    old_state = {**state, "format": 1, "config": config}
    snap_config = {**config, "description": "before a settings change"}
    old_snap = {**state, "format": 1, "config": snap_config}
    now = datetime.now(UTC)
    engine = make_engine(empty_url)
    try:
        migrate.upgrade(engine, "0003")
        snapshot_0003 = table("snapshot", column("pk"), column("channel_pk"), column("reason"), column("label"),
                              column("model_state", JSON), column("version"), column("n_samples"),
                              column("created_at", UTCDateTime))
        with engine.begin() as conn:
            conn.execute(insert(Channel.__table__).values(pk=1, id="site-a.p1", config=config, created_at=now))
            conn.execute(insert(ChannelState.__table__).values(
                channel_pk=1, model_state=old_state, version=60, n_samples=60, n_rejected=0, drift_state="ok",
                tolerance_state=None, rmse=model.summary()["rmse"], last_sample_at=None, updated_at=now))
            conn.execute(insert(snapshot_0003).values(pk=1, channel_pk=1, reason="manual", label=None,
                                                      model_state=old_snap, version=60, n_samples=60,
                                                      created_at=now))
        migrate.upgrade(engine)
        with engine.connect() as conn:
            assert conn.execute(select(ChannelState.model_state)).scalar_one() == state
            assert conn.execute(select(Channel.config)).scalar_one() == _filled(config)
            assert conn.execute(select(Snapshot.config, Snapshot.model_state)).one() == (_filled(snap_config), state)
    finally:
        engine.dispose()
    store = Store(empty_url)
    try:
        with Work(store).unit(write=False) as unit:
            repo = unit.repo
            got = channels.get(unit, "site-a.p1")
            assert got["n_samples"] == 60 and got["drift"]["detector"] == "cusum"
            assert got["rmse"] == model.summary()["rmse"]
            st = repo.learning_state("site-a.p1", lock=False)
            assert st is not None
            loaded = unit.read_model(st)
            assert _as_format_2(loaded.to_state()) == state and loaded.config == _filled(config)
            snap = repo.get_snapshot(1, 1)
            assert snap is not None
            assert _as_format_2(ChannelModel.from_state(snap.config, snap.model_state).to_state()) == state
    finally:
        store.dispose()
    engine = make_engine(empty_url)
    try:
        _downgrade(engine, "0003")
        with engine.connect() as conn:
            states = [conn.execute(text(f"SELECT model_state FROM {t}")).scalar_one()
                      for t in ("channel_state", "snapshot")]
            assert [json.loads(s) if isinstance(s, str) else s for s in states] == [old_state, old_snap]
    finally:
        engine.dispose()


NEW_IN_3 = ("reference_n", "reference_mean", "reference_var", "trace_bound", "initialising", "n_held",
            "outlier_run", "gate_var")


def _as_format_2(state: dict[str, Any]) -> dict[str, Any]:
    """A format-3 state as format 2 wrote it (no reference residuals, change points, RLS
    information vector, service state)."""
    out = {k: v for k, v in state.items()
           if k not in ("change_weights", "info_b", "service", "input_span", "calibration_span")}  # format 4's
    out["format"] = 2
    out["running"] = {k: v for k, v in state["running"].items() if k not in NEW_IN_3}
    out["detector"] = dict(state["detector"])
    return out


#: the calibration settings 0008 fills in, as it fills them
NEW_IN_0008 = {"decision_rule": "simple", "recalibration_interval_days": 365, "due_soon_days": 30}
#: the silence watch's setting 0010 fills in: not watched
NEW_IN_0010 = {"expected_interval": None}


def _as_before_0005(config: dict[str, Any]) -> dict[str, Any]:
    # require_reference came later still (0007), the calibration settings in 0008
    out = {k: v for k, v in config.items()
           if k not in ("coverage", "reference", "range_margin", "require_reference", *NEW_IN_0008, *NEW_IN_0010)}
    out["inputs"] = [{k: v for k, v in i.items() if k != "resolution"} for i in config["inputs"]]
    out["coverage_factor"] = 2.0
    return out


def _filled(config: dict[str, Any]) -> dict[str, Any]:
    return {"coverage": 0.95, "reference": None, "range_margin": 1.0, "require_reference": False, **NEW_IN_0008,
            **NEW_IN_0010, **config,
            "inputs": [{"resolution": None, **i} for i in config["inputs"]]}


def test_0005_fills_the_trust_settings_with_the_old_behaviour(empty_url: str) -> None:
    """A channel and snapshot from before 0005 (rls, fixed k = 2, no margin) get coverage
    0.95, no reference, margin 1, no resolution and covariance_bound 10, keep their k and
    initial_covariance, and load and predict; downgrading removes the fields again."""
    config = _as_before_0005(channel_config({"id": "site-b.p2", "inputs": [{"name": "raw", "min": 0, "max": 10}],
                                             "learner": {"kind": "rls", "initial_covariance": 1000.0}}))
    config["learner"].pop("covariance_bound")
    now = datetime.now(UTC)
    engine = make_engine(empty_url)
    try:
        migrate.upgrade(engine, "0004")
        model = ChannelModel.from_config(channel_config({k: v for k, v in config.items() if k != "id"}))
        model.learn([1.0, 5.0, 9.0], [2.0, 6.0, 10.0])
        state = _as_format_2(model.to_state())
        with engine.begin() as conn:
            conn.execute(insert(Channel.__table__).values(pk=1, id="site-b.p2", config=config, created_at=now))
            conn.execute(insert(ChannelState.__table__).values(
                channel_pk=1, model_state=state, version=3, n_samples=3, n_rejected=0, drift_state="ok",
                tolerance_state=None, rmse=None, last_sample_at=None, updated_at=now))
            conn.execute(insert(Snapshot.__table__).values(pk=1, channel_pk=1, reason="manual", label=None,
                                                           config=config, model_state=state, version=3,
                                                           n_samples=3, created_at=now))
        migrate.upgrade(engine)
        with engine.connect() as conn:
            got = conn.execute(select(Channel.config)).scalar_one()
            assert conn.execute(select(Snapshot.config)).scalar_one() == got
        assert got["coverage"] == 0.95 and got["coverage_factor"] == 2.0 and got["reference"] is None
        assert got["range_margin"] == 1.0 and got["inputs"][0]["resolution"] is None
        assert got["learner"] == {**config["learner"], "covariance_bound": 10.0}
        assert channel_config({k: v for k, v in got.items() if k != "id"}) == {
            k: v for k, v in got.items() if k != "id"}  # a complete, valid declaration
        loaded = ChannelModel.from_state(got, state)
        p = loaded.prediction([[5.0]])
        assert p.k[0] == 2.0
        _downgrade(engine, "0004")
        with engine.connect() as conn:
            assert conn.execute(select(Channel.config)).scalar_one() == config
    finally:
        engine.dispose()


def _downgrade(engine: Engine, revision: str) -> None:
    cfg = migrate.alembic_config(engine)
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.downgrade(cfg, revision)


def test_0008_fills_the_calibration_settings_and_due_dates_from_calibration_events(empty_url: str) -> None:
    """A channel calibrated before records existed gets decision_rule simple, a 365-day
    interval and a 30-day due-soon window, and a due date 365 days after its latest
    calibration event; one never calibrated has none. Downgrading removes them again."""
    config = channel_config({"id": "site-c.p3", "inputs": [{"name": "raw", "min": 0, "max": 10}]})
    old = {k: v for k, v in config.items() if k not in {**NEW_IN_0008, **NEW_IN_0010}}
    state = ChannelModel.from_config(config).to_state()
    at = datetime(2026, 3, 1, 9, 30, tzinfo=UTC)
    engine = make_engine(empty_url)
    try:
        migrate.upgrade(engine, "0007")
        event_0005 = table("event", column("channel_pk"), column("kind"), column("version"), column("key_id"),
                           column("at", UTCDateTime), column("details", JSON))
        state_0005 = table("channel_state", column("channel_pk"), column("model_state", JSON), column("version"),
                           column("n_samples"), column("n_rejected"), column("drift_state"),
                           column("updated_at", UTCDateTime))
        with engine.begin() as conn:
            for pk, cid in ((1, "site-c.p3"), (2, "site-c.p4")):
                conn.execute(insert(Channel.__table__).values(pk=pk, id=cid, config={**old, "id": cid},
                                                              created_at=at))
                conn.execute(insert(state_0005).values(channel_pk=pk, model_state=state, version=2, n_samples=0,
                                                       n_rejected=0, drift_state="ok", updated_at=at))
            for when in (at - timedelta(days=40), at):  # the latest counts
                conn.execute(insert(event_0005).values(channel_pk=1, kind="calibration", version=1, key_id=None,
                                                       at=when, details={}))
        migrate.upgrade(engine)
        with engine.connect() as conn:
            rows = conn.execute(select(Channel.config, ChannelState.last_calibrated_at, ChannelState.due_on,
                                       ChannelState.due_soon_on).join_from(
                Channel, ChannelState, Channel.pk == ChannelState.channel_pk).order_by(Channel.pk)).all()
        assert rows[0][0] == config and rows[1][0] == {**config, "id": "site-c.p4"}
        # 2026-03-01 + 365 d = 2027-03-01 (2026 is not a leap year); due soon 30 d before
        assert tuple(rows[0][1:]) == (at, date(2027, 3, 1), date(2027, 1, 30))
        assert tuple(rows[1][1:]) == (None, None, None)
        _downgrade(engine, "0007")
        with engine.connect() as conn:
            assert conn.execute(select(Channel.config).where(Channel.pk == 1)).scalar_one() == old
    finally:
        engine.dispose()


def test_0010_watches_no_channel_and_takes_the_service_state_and_last_receipt(empty_url: str) -> None:
    """Before 0010 a channel had no expected_interval: after it, every channel and snapshot
    has it null (not watched, never stale), each state row has its model state's service
    state, and silent_since is the latest sample's receipt (else the channel's creation).
    Downgrading removes the field again."""
    config = channel_config({"id": "site-d.p1", "inputs": [{"name": "raw", "min": 0, "max": 10}]})
    old = {k: v for k, v in config.items() if k not in NEW_IN_0010}
    state = ChannelModel.from_config(config).to_state()
    created = datetime(2026, 5, 1, 12, 0, tzinfo=UTC)
    received = datetime(2026, 6, 1, 7, 30, tzinfo=UTC)
    engine = make_engine(empty_url)
    try:
        migrate.upgrade(engine, "0009")
        state_0009 = table("channel_state", column("channel_pk"), column("model_state", JSON), column("version"),
                           column("n_samples"), column("n_rejected"), column("drift_state"),
                           column("updated_at", UTCDateTime))
        sample_0009 = table("sample", column("channel_pk"), column("seq"), column("version"), column("t", UTCDateTime),
                            column("received_at", UTCDateTime), column("x", JSON), column("y"), column("accepted"))
        with engine.begin() as conn:
            for pk, cid, service, n in ((1, "site-d.p1", "in_service", 2), (2, "site-d.p2", "out_of_service", 0)):
                conn.execute(insert(Channel.__table__).values(pk=pk, id=cid, config={**old, "id": cid},
                                                              created_at=created))
                conn.execute(insert(state_0009).values(channel_pk=pk, model_state={**state, "service": service},
                                                       version=n, n_samples=n, n_rejected=0, drift_state="ok",
                                                       updated_at=created))
            for seq, at in ((1, received - timedelta(hours=1)), (2, received)):
                conn.execute(insert(sample_0009).values(channel_pk=1, seq=seq, version=seq, t=at, received_at=at,
                                                        x=[1.0], y=2.0, accepted=True))
        migrate.upgrade(engine)
        with engine.connect() as conn:
            rows = conn.execute(select(Channel.config, ChannelState.service_state, ChannelState.silent_since,
                                       ChannelState.stale_after, ChannelState.stale_since)
                                .join_from(Channel, ChannelState, Channel.pk == ChannelState.channel_pk)
                                .order_by(Channel.pk)).all()
        assert rows[0][0] == config and rows[1][0] == {**config, "id": "site-d.p2"}
        assert tuple(rows[0][1:]) == ("in_service", received, None, None)
        assert tuple(rows[1][1:]) == ("out_of_service", created, None, None)
        _downgrade(engine, "0009")
        with engine.connect() as conn:
            assert conn.execute(select(Channel.config).where(Channel.pk == 1)).scalar_one() == old
    finally:
        engine.dispose()


def test_a_store_at_head_opens_without_reading_the_migrations(tmp_path: Path) -> None:
    """Start-up on a current store is one query: Alembic is not even imported."""
    url = f"sqlite:///{tmp_path / 'current.db'}"
    Store(url).dispose()  # made, by migrations
    code = ("import sys; from curvekeeper.store import Store; Store(sys.argv[1]).dispose(); "
            "print('alembic' in sys.modules)")
    run = subprocess.run([sys.executable, "-c", code, url], capture_output=True, text=True, timeout=120,
                         env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2] / "service")})
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == "False"
