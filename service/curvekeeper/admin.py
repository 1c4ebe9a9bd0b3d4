"""The admin commands: ``keys create``, ``keys list|revoke --db``, ``db upgrade``, ``db backup``, ``replay``.

They work directly on an existing store and never create one: a store that is not
there (an SQLite file that does not exist, a PostgreSQL database that cannot be
opened) is refused with exit status 2, naming the store tried and how to choose
another, and so is a store without curvekeeper's schema, except for ``db upgrade``,
whose job is to make the schema in an existing database (an existing, even empty,
SQLite file; it refuses a missing one like the others). ``serve`` and ``demo`` are the
commands that set up a new store. Each command says on standard error which store it
used, with any password in the URL masked.
"""

from __future__ import annotations

import argparse
import json
import os
import sqlite3
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any, NamedTuple

from sqlalchemy.engine import URL, make_url
from sqlalchemy.exc import SQLAlchemyError

from .config import PREFIX, Settings

if TYPE_CHECKING:
    from .store import Store

ENV = PREFIX + "DATABASE_URL"


class NoStore(Exception):
    """The store named is missing, cannot be opened, or has no curvekeeper schema."""


class Existing(NamedTuple):
    url: str
    path: Path | None  # the file of an SQLite store


def masked(url: str) -> str:
    """The URL with its password (and any password-like query value) replaced by ***."""
    u = make_url(url)
    query = {k: "***" if "pass" in k.lower() or "secret" in k.lower() else v for k, v in u.query.items()}
    return u.set(query=query).render_as_string(hide_password=True)


def _choose() -> str:
    return (f"choose the store with --db URL or {ENV} (the demo's is sqlite:///curvekeeper-demo.db); "
            "`curvekeeper serve` sets up a new one")


def _sqlite_path(u: URL) -> Path | None:
    """The file of an SQLite URL (``file:`` URIs included); None for an in-memory store."""
    db = u.database or ""
    if db in ("", ":memory:") or "mode=memory" in db:
        return None
    if db.startswith("file:"):
        db = db[len("file:"):].split("?", 1)[0]
    return Path(db)


def _sqlite_revision(path: Path) -> str | None:
    """The migration revision of an existing SQLite file, read-only (None: no schema)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        row = conn.execute("SELECT version_num FROM alembic_version").fetchone()
    except sqlite3.OperationalError as exc:
        if "no such table" in str(exc):
            return None
        raise
    finally:
        conn.close()
    return None if row is None else str(row[0])


def _named(args: argparse.Namespace) -> tuple[str, str]:
    """The command's store URL and where it came from."""
    url = Settings.from_env(database_url=getattr(args, "db", None)).database_url
    return url, "--db" if getattr(args, "db", None) else ENV if os.environ.get(ENV) else "the default"


def open_existing(args: argparse.Namespace, command: str, *, schema: bool = True) -> Existing:
    """The URL of the command's store after checking that the store exists (and, with
    ``schema``, holds curvekeeper's schema) without creating anything; says on standard
    error which store is used. Raises NoStore with the message for the user."""
    url, source = _named(args)
    u = make_url(url)
    path: Path | None = None
    if u.get_backend_name() == "sqlite":
        path = _sqlite_path(u)
        if path is None:
            raise NoStore(f"{command}: {masked(url)} ({source}) is an in-memory store, empty by nature; {_choose()}")
        shown = f"{masked(url)} ({source}; file {path.resolve()})"
        if not path.is_file():
            raise NoStore(f"{command}: no store at {path.resolve()} ({masked(url)}, {source}); admin commands "
                          f"use an existing store and never create one: {_choose()}")
        try:
            revision = _sqlite_revision(path)
        except sqlite3.DatabaseError as exc:
            raise NoStore(f"{command}: {path.resolve()} is not an SQLite store ({exc}); {_choose()}") from exc
    else:
        shown = f"{masked(url)} ({source})"
        from .store import migrate
        from .store.engine import make_engine

        engine = make_engine(url)
        try:
            revision = migrate.current_revision(engine)
        except SQLAlchemyError as exc:
            reason = str(getattr(exc, "orig", None) or exc).strip().splitlines()[0]
            raise NoStore(f"{command}: cannot open the store {shown}: {reason}; {_choose()}") from exc
        finally:
            engine.dispose()
    if schema and revision is None:
        raise NoStore(f"{command}: the store {shown} has no curvekeeper schema (not a curvekeeper store?); "
                      f"`curvekeeper db upgrade` makes it in an existing database, or {_choose()}")
    print(f"{command}: store {shown}", file=sys.stderr)
    return Existing(url, path)


def _refused(exc: NoStore) -> int:
    print(f"curvekeeper {exc}", file=sys.stderr)
    return 2


def _iso(value: Any) -> str:
    return str(value.isoformat())  # a datetime, as the service's JSON writes it


def open_store(args: argparse.Namespace, command: str) -> Store | int:
    """The existing store the command names, opened; or, printed, why not (exit status 2):
    missing, not ours, or behind this version's schema (``SchemaError``)."""
    from .errors import ServiceError
    from .store import Store

    try:
        return Store(open_existing(args, command).url)
    except NoStore as exc:
        return _refused(exc)
    except ServiceError as exc:
        print(f"{command}: {exc.message}", file=sys.stderr)
        return 2


def cmd_keys_create(args: argparse.Namespace) -> int:
    from .actions import keys
    from .errors import ServiceError

    store = open_store(args, "keys create")
    if isinstance(store, int):
        return store
    try:
        with store.transaction(write=True) as repo:
            key = keys.create(repo, role=args.role, prefixes=args.prefix or [], label=args.label, key_id=None,
                              by="command line")
    except ServiceError as exc:
        print(f"keys create: {exc.message}", file=sys.stderr)
        return 2
    finally:
        store.dispose()
    print(json.dumps({k: key[k] for k in ("id", "role", "prefixes", "secret")}))
    print("keep the secret now: it is not stored and cannot be shown again", file=sys.stderr)
    return 0


def cmd_keys_list(args: argparse.Namespace) -> int:
    """``keys list --db``: the keys as ``GET /v1/keys`` lists them (the same action), printed
    as ``keys list`` prints the service's."""
    from .actions import keys
    from .techcli.manage import print_keys

    store = open_store(args, "keys list")
    if isinstance(store, int):
        return store
    items: list[dict[str, object]] = []
    cursor: str | None = None
    try:
        with store.transaction(write=False) as repo:
            while True:
                page = keys.list_(repo, cursor=cursor, limit=1000)
                items += page.items
                if not (cursor := page.next_cursor):
                    break
    finally:
        store.dispose()
    print_keys(json.loads(json.dumps(items, default=_iso)), args.json)
    return 0


def cmd_keys_revoke(args: argparse.Namespace) -> int:
    """``keys revoke KEY_ID --db``: as ``DELETE /v1/keys/{id}`` does it (the same action, an
    event without an acting key, ``by`` the command line). A server caches keys for a few
    seconds: one running on this store refuses the key within that time."""
    from .actions import keys
    from .errors import ServiceError
    from .techcli.common import LocalError
    from .techcli.manage import check_key_id, print_revoked

    try:
        check_key_id(args.key_id)
    except LocalError as exc:
        print(f"curvekeeper: {exc}", file=sys.stderr)
        return 2
    store = open_store(args, "keys revoke")
    if isinstance(store, int):
        return store
    try:
        with store.transaction(write=True) as repo:
            key = keys.revoke(repo, args.key_id, None)
    except ServiceError as exc:
        print(f"keys revoke: {exc.message}", file=sys.stderr)
        return 1
    finally:
        store.dispose()
    print_revoked(json.loads(json.dumps(key, default=_iso)))
    return 0


def cmd_db_upgrade(args: argparse.Namespace) -> int:
    from .store import migrate
    from .store.engine import make_engine

    try:
        url = open_existing(args, "db upgrade", schema=False).url
    except NoStore as exc:
        return _refused(exc)
    engine = make_engine(url)
    try:
        before = migrate.current_revision(engine)
        migrate.upgrade(engine)
        print(f"schema at revision {migrate.current_revision(engine)} (was {before or 'empty'})")
    finally:
        engine.dispose()
    return 0


def cmd_db_backup(args: argparse.Namespace) -> int:
    url, named = _named(args)
    if make_url(url).get_backend_name() != "sqlite":
        print(f"db backup copies SQLite stores, and the store is {masked(url)} ({named}): back up PostgreSQL "
              "with pg_dump (see the README)", file=sys.stderr)
        return 2
    try:
        source = open_existing(args, "db backup").path
    except NoStore as exc:
        return _refused(exc)
    target = Path(args.path)
    if target.exists():
        print(f"{target} exists; choose a new path", file=sys.stderr)
        return 2
    from .store.engine import create_private

    if not create_private(target):  # private like the store: a backup holds the same readings and key hashes
        print(f"{target} exists or its folder does not; choose a new path", file=sys.stderr)
        return 2
    src = sqlite3.connect(f"file:{source}?mode=ro", uri=True)
    dst = sqlite3.connect(target)
    try:
        # SQLite's online backup: a consistent copy while the service keeps writing
        src.backup(dst, pages=1024)
        ok = dst.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        dst.close()
        src.close()
    print(f"backup of {source} written to {target} (integrity: {ok})")
    return 0 if ok == "ok" else 1


def cmd_replay(args: argparse.Namespace) -> int:
    from tqdm import tqdm

    from .actions.replay import replay
    from .errors import ServiceError

    store = open_store(args, "replay")
    if isinstance(store, int):
        return store
    try:
        with store.transaction(write=False) as repo, tqdm(unit="sample", desc=args.channel,
                                                          disable=args.quiet or None) as bar:
            report = replay(repo, args.channel, from_snapshot=args.from_snapshot, check=args.check,
                            progress=bar.update)
    except ServiceError as exc:
        print(f"replay: {exc.message}", file=sys.stderr)
        return 2
    finally:
        store.dispose()
    print(f"{report.channel}: replayed {report.replayed_samples} samples and {report.replayed_events} "
          f"state changes from version {report.start_version} to {report.version}"
          + ("; the log leaves it archived" if report.archived else ""))
    if args.check:
        if report.matches:
            print("check: the replayed state equals the stored state, bit for bit")
            return 0
        print("check: MISMATCH", file=sys.stderr)
        for line in report.mismatches:
            print(f"  {line}", file=sys.stderr)
        return 1
    if args.output:
        Path(args.output).write_text(json.dumps(report.state))
    return 0
