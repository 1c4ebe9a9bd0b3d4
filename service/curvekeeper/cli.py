"""The ``curvekeeper`` command line."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

from .config import Settings

EXISTING_DB = ("SQLAlchemy URL of an existing store (default: CURVEKEEPER_DATABASE_URL, "
               "else sqlite:///curvekeeper.db)")


def _admin(name: str) -> Callable[[argparse.Namespace], int]:
    """An admin command of ``curvekeeper.admin``, imported when it runs (it needs SQLAlchemy)."""
    def run(args: argparse.Namespace) -> int:
        from . import admin

        return int(getattr(admin, name)(args))
    return run


def _settings(args: argparse.Namespace) -> Settings:
    return Settings.from_env(database_url=getattr(args, "db", None), host=getattr(args, "host", None),
                             port=getattr(args, "port", None), mqtt_url=getattr(args, "mqtt", None))


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from .admin import masked
    from .api import create_app

    try:
        settings = _settings(args)
    except ValueError as exc:  # a setting or option the service cannot start with, e.g. --mqtt http://...
        print(f"curvekeeper serve: {exc}", file=sys.stderr)
        return 2
    _first_key(settings)
    app = create_app(settings)
    print(f"curvekeeper {masked(settings.database_url)} -> http://{settings.host}:{settings.port}/  "
          f"(API docs at http://{settings.host}:{settings.port}/docs; Ctrl-C stops)", flush=True)
    if settings.mqtt_url:
        group = f"shared as group {settings.mqtt_share_group!r}" if settings.mqtt_share_group else "not shared"
        print(f"samples also from MQTT {masked(settings.mqtt_url)}, "
              f"topics {settings.mqtt_topic_root}/samples/<channel> ({group}), "
              f"client id {settings.mqtt_client_id!r}", flush=True)
    uvicorn.run(app, host=settings.host, port=settings.port, log_level=settings.log_level,
                access_log=args.access_log)
    return 0


def _first_key(settings: Settings) -> None:
    """On a store with no keys at all (and no CURVEKEEPER_ADMIN_KEY), mint an admin key and
    print it once, so a fresh install can be used at once."""
    from .actions import keys
    from .store import Store

    if settings.admin_key:
        return
    store = Store(settings.database_url, busy_timeout_s=settings.busy_timeout_s)
    try:
        with store.transaction(write=True) as repo:
            key = keys.first_admin_key(repo)
    finally:
        store.dispose()
    if key is not None:
        print(f"first start: admin key {key['id']} created; its secret (shown once): {key['secret']}", flush=True)


def _simulate(args: argparse.Namespace) -> int:
    import os

    from tqdm import tqdm

    from .client import Client, ClientError
    from .demo import scenario
    from .demo.run import T0
    from .demo.simulator import simulate

    key = os.environ.get("CURVEKEEPER_KEY")
    if not key:
        print("set CURVEKEEPER_KEY to a technician or admin key", file=sys.stderr)
        return 2
    stream = scenario.stream(seed=args.seed, days=args.days, step_min=args.step_min)
    try:
        with Client(args.url, key) as c, tqdm(total=len(stream.channel), unit="sample", disable=None) as bar:
            for p in scenario.PROBES:
                cid = scenario.channel_id(p)
                try:
                    c.get_channel(cid)
                except ClientError as exc:
                    if exc.status != 404:
                        raise
                    c.create_channel(scenario.channel_config(p))
                    c.request("POST", f"/v1/channels/{cid}/calibrate",
                              json={"points": scenario.bench_points(args.seed, cid), "label": "bath calibration"})
            gateway = [scenario.channel_id(p) for p in scenario.PROBES if p.split(".")[0] in ("chill", "produce")]
            report = simulate(c, stream, t0=T0, gateway=gateway, rate=args.rate, progress=bar.update)
    except ClientError as exc:
        print(f"simulate: {exc}", file=sys.stderr)
        return 1
    print(f"{report.requests} requests: {report.accepted} learned, {report.rejected} held back, "
          f"{report.duplicates} duplicates (a re-run posts the same seq numbers: all duplicates)")
    return 0


def _demo(args: argparse.Namespace) -> int:
    from .demo.run import demo_command

    return demo_command(args)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="curvekeeper", description="Online calibration service for sensor fleets.",
                                epilog="Caution: curvekeeper supports calibration work; it does not replace "
                                       "traceable, accredited calibration, nor the regulations that apply where "
                                       "the sensors are used.")
    sub = p.add_subparsers(dest="command", required=True)

    serve = sub.add_parser("serve", help="run the HTTP service")
    serve.add_argument("--host", help="address to listen on (default 127.0.0.1)")
    serve.add_argument("--port", type=int, help="port (default 8000)")
    serve.add_argument("--db", help="SQLAlchemy URL (default sqlite:///curvekeeper.db)")
    serve.add_argument("--mqtt", metavar="URL",
                       help="also learn samples from this MQTT broker, e.g. mqtt://127.0.0.1:1883 "
                            "(topics curvekeeper/v1/samples/<channel>; default: CURVEKEEPER_MQTT_URL, else none)")
    serve.add_argument("--access-log", action="store_true", help="log every request")
    serve.set_defaults(func=cmd_serve)

    demo = sub.add_parser("demo", help="run the service with the cold-store demo (about 15 s), then serve")
    demo.add_argument("--db-file", default="curvekeeper-demo.db", help="SQLite file of the demo (replaced)")
    demo.add_argument("--host", default="127.0.0.1", help="address to serve on (default 127.0.0.1: this machine only)")
    demo.add_argument("--port", type=int, default=8000, help="port to serve on (default 8000)")
    demo.add_argument("--fast", action="store_true", help="fewer samples (a reading every 2 hours)")
    demo.add_argument("--no-wait", action="store_true", help="stop after the story instead of serving")
    demo.set_defaults(func=_demo)

    sim = sub.add_parser("simulate", help="post the cold-store scenario to a running service like a device fleet")
    sim.add_argument("--url", default="http://127.0.0.1:8000", help="the running service (default http://127.0.0.1:8000)")
    sim.add_argument("--days", type=float, default=60.0, help="days of readings (default 60)")
    sim.add_argument("--step-min", type=float, default=30.0, help="minutes between readings (default 30)")
    sim.add_argument("--rate", type=float, default=0.0, help="samples per second at most (default: no cap)")
    sim.add_argument("--seed", type=int, default=7, help="seed of the invented scenario (default 7: the demo's)")
    sim.set_defaults(func=_simulate)

    keys = sub.add_parser("keys", help="manage API keys: create one in an existing store (never creates a store); "
                                       "list or revoke them through the service, or in the store with --db")
    keys_sub = keys.add_subparsers(dest="keys_command", required=True)
    create = keys_sub.add_parser("create", help="mint a key and print its secret once")
    create.add_argument("--role", required=True, choices=["admin", "technician", "device"], help="what the key may do")
    create.add_argument("--prefix", action="append", help="channel-id prefix a device key may use (repeatable)")
    create.add_argument("--label", help="what the key is for")
    create.add_argument("--db", help=EXISTING_DB)
    create.set_defaults(func=_admin("cmd_keys_create"))
    from . import techcli

    techcli.add_key_commands(keys_sub, EXISTING_DB, _admin)

    db = sub.add_parser("db", help="maintenance of an existing store (never creates one)")
    db_sub = db.add_subparsers(dest="db_command", required=True)
    up = db_sub.add_parser("upgrade", help="bring the store's schema to this version (migrations); makes the schema "
                                         "in an existing empty database, refuses a missing SQLite file")
    up.add_argument("--db", help=EXISTING_DB)
    up.set_defaults(func=_admin("cmd_db_upgrade"))
    backup = db_sub.add_parser("backup", help="consistent online copy of a SQLite store")
    backup.add_argument("path", help="file to write (must not exist)")
    backup.add_argument("--db", help=EXISTING_DB)
    backup.set_defaults(func=_admin("cmd_db_backup"))

    rp = sub.add_parser("replay", help="rebuild a channel's state from its log in an existing store; --check "
                                   "compares it")
    rp.add_argument("channel", help="the channel's id")
    rp.add_argument("--from-snapshot", type=int, help="start from this snapshot instead of the creation")
    rp.add_argument("--check", action="store_true", help="compare with the stored state; exit 1 on a mismatch")
    rp.add_argument("--output", help="write the replayed state (JSON) to this file")
    rp.add_argument("--quiet", action="store_true", help="no progress bar")
    rp.add_argument("--db", help=EXISTING_DB)
    rp.set_defaults(func=_admin("cmd_replay"))

    from . import techcli

    techcli.add_commands(sub)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":
    raise SystemExit(main())
