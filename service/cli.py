"""The ``curvekeeper`` command line."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence

from .config import Settings


def _settings(args: argparse.Namespace) -> Settings:
    return Settings.from_env(database_url=getattr(args, "db", None), host=getattr(args, "host", None),
                             port=getattr(args, "port", None))


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from .api import create_app

    settings = _settings(args)
    _first_key(settings)
    app = create_app(settings)
    print(f"curvekeeper {settings.database_url} -> http://{settings.host}:{settings.port}/  "
          f"(API docs at http://{settings.host}:{settings.port}/docs; Ctrl-C stops)", flush=True)
    uvicorn.run(app, host=settings.host, port=settings.port, log_level=settings.log_level,
                access_log=args.access_log)
    return 0


def _first_key(settings: Settings) -> None:
    """On a store with no keys at all (and no CURVEKEEPER_ADMIN_KEY), mint an admin key and
    print it once, so a fresh install can be used at once."""
    from . import auth
    from .store import Store
    from .store.tables import ApiKey

    if settings.admin_key:
        return
    store = Store(settings.database_url, busy_timeout_s=settings.busy_timeout_s)
    try:
        with store.transaction(write=True) as repo:
            if repo.count_rows(ApiKey):
                return
            key, secret = auth.create_key(repo, role="admin", prefixes=[], label="first admin key")
        print(f"first start: admin key {key.id} created; its secret (shown once): {secret}", flush=True)
    finally:
        store.dispose()


def cmd_keys_create(args: argparse.Namespace) -> int:
    from . import auth
    from .store import Store

    if args.prefix and args.role != "device":
        print("--prefix limits device keys only", file=sys.stderr)
        return 2
    store = Store(_settings(args).database_url)
    try:
        with store.transaction(write=True) as repo:
            key, secret = auth.create_key(repo, role=args.role, prefixes=args.prefix or [], label=args.label)
            repo.insert_events([{"channel_pk": None, "kind": "key_created", "key_id": None,
                                 "details": {"id": key.id, "role": key.role, "prefixes": key.prefixes,
                                             "label": key.label, "by": "command line"}}])
    finally:
        store.dispose()
    print(json.dumps({"id": key.id, "role": key.role, "prefixes": key.prefixes, "secret": secret}))
    print("keep the secret now: it is not stored and cannot be shown again", file=sys.stderr)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="curvekeeper", description="Online calibration service for sensor fleets.")
    sub = p.add_subparsers(dest="command", required=True)

    serve = sub.add_parser("serve", help="run the HTTP service")
    serve.add_argument("--host", help="address to listen on (default 127.0.0.1)")
    serve.add_argument("--port", type=int, help="port (default 8000)")
    serve.add_argument("--db", help="SQLAlchemy URL (default sqlite:///curvekeeper.db)")
    serve.add_argument("--access-log", action="store_true", help="log every request")
    serve.set_defaults(func=cmd_serve)

    keys = sub.add_parser("keys", help="manage API keys directly in the store")
    keys_sub = keys.add_subparsers(dest="keys_command", required=True)
    create = keys_sub.add_parser("create", help="mint a key and print its secret once")
    create.add_argument("--role", required=True, choices=["admin", "technician", "device"])
    create.add_argument("--prefix", action="append", help="channel-id prefix a device key may use (repeatable)")
    create.add_argument("--label", help="what the key is for")
    create.add_argument("--db", help="SQLAlchemy URL (default sqlite:///curvekeeper.db)")
    create.set_defaults(func=cmd_keys_create)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":
    raise SystemExit(main())
