"""`curvekeeper serve` on a store without any key mints one admin key, once, and says so."""

from __future__ import annotations

from pathlib import Path

import pytest
from curvekeeper.auth import hash_secret
from curvekeeper.cli import _first_key
from curvekeeper.config import Settings
from curvekeeper.store import Store
from curvekeeper.store.tables import ApiKey, Event
from sqlalchemy import select


def test_first_start_mints_one_admin_key_and_prints_it_once(tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'fresh.db'}")
    _first_key(settings)
    out = capsys.readouterr().out
    secret = out.strip().rsplit(" ", 1)[-1]
    assert "first start: admin key" in out and secret.startswith("ck_")
    _first_key(settings)  # a second start finds the key and prints nothing
    assert capsys.readouterr().out == ""
    store = Store(settings.database_url)
    try:
        with store.transaction(write=False) as repo:
            keys = list(repo.session.scalars(select(ApiKey)))
            events = list(repo.session.scalars(select(Event)))
    finally:
        store.dispose()
    assert [(k.role, k.secret_hash) for k in keys] == [("admin", hash_secret(secret))]
    assert [(e.kind, e.details["by"]) for e in events] == [("key_created", "first start")]


def test_no_key_is_minted_when_the_admin_key_is_configured(tmp_path: Path,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'fresh.db'}", admin_key="ck_configured-0123456789")
    _first_key(settings)
    assert capsys.readouterr().out == ""
