"""The technician's and the admin's management commands: ``channels create|patch`` from a
JSON or TOML file, ``channels archive|unarchive``, ``keys list|revoke`` (through the
service; ``keys list|revoke --db`` work on the store directly, ``curvekeeper.admin``)."""

from __future__ import annotations

import argparse
import json
import re
import sys
import tomllib
from pathlib import Path
from typing import Any

from .. import display
from ..client import Client
from .common import LocalError, _json, _pages, _table

#: the kinds of file a channel definition may come in, by extension
FILE_KINDS = {".json": "JSON", ".toml": "TOML"}


def read_definition(path: str) -> dict[str, Any]:
    """A channel definition (or the changes of a PATCH) from a ``.json`` or ``.toml`` file, as
    an object; ``LocalError`` saying what is wrong and where (line and column) otherwise.
    TOML has no null: a change to null (e.g. ``coverage_factor``) needs a JSON file."""
    p = Path(path)
    kind = FILE_KINDS.get(p.suffix.lower())
    if kind is None:
        raise LocalError(f"{path}: unknown file type {p.suffix or '(no extension)'!r}; use a .json or .toml file")
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise LocalError(f"{path}: not UTF-8 text (byte {exc.start})") from exc
    try:
        data = json.loads(text) if kind == "JSON" else tomllib.loads(text)
    except json.JSONDecodeError as exc:
        raise LocalError(f"{path}: not valid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise LocalError(f"{path}: not valid TOML: {exc}") from exc
    if not isinstance(data, dict):
        raise LocalError(f"{path}: the file must hold one object (the channel's fields), not a "
                         f"{type(data).__name__}")
    return data


def _said(ch: dict[str, Any], what: str) -> None:
    print(f"{what} {ch['id']}: version {ch['version']}, {ch['n_samples']} samples"
          + (f", archived {display.when(ch.get('archived_at'))} UTC" if ch.get("archived") else ""))


def channels_create(client: Client, args: argparse.Namespace) -> int:
    body = read_definition(args.file)
    ch = client.request("POST", "/v1/channels", json=body, idempotent=False)
    for w in ch.get("warnings") or []:
        print(f"warning: {w}", file=sys.stderr)
    if args.json:
        _json(ch)
    else:
        _said(ch, "created channel")
    return 0


def channels_patch(client: Client, args: argparse.Namespace) -> int:
    changes = read_definition(args.file)
    if "id" in changes:
        if changes["id"] != args.channel:
            raise LocalError(f"{args.file} names channel {changes['id']!r}, not {args.channel!r}")
        changes = {k: v for k, v in changes.items() if k != "id"}
    ch = client.request("PATCH", f"/v1/channels/{args.channel}", json=changes, idempotent=False)
    if args.json:
        _json(ch)
        return 0
    _said(ch, "changed channel")
    return 0


def channels_archive(client: Client, args: argparse.Namespace) -> int:
    verb = "archive" if args.channels_command == "archive" else "unarchive"
    body = {"note": args.note} if args.note else {}
    ch = client.request("POST", f"/v1/channels/{args.channel}/{verb}", json=body, idempotent=False)
    _said(ch, f"{verb}d channel")
    return 0


# keys ------------------------------------------------------------------------------------
KEY_HEADERS = ["id", "role", "prefixes", "label", "created", "last used", "revoked"]


def key_rows(items: list[dict[str, Any]]) -> list[list[str]]:
    """Keys as the table shows them (times in the display rule's form, UTC)."""
    return [[k["id"], k["role"], ",".join(k.get("prefixes") or []) or "-", k.get("label") or "-",
             display.when(k.get("created_at")), display.when(k.get("last_used_at"), "never"),
             display.when(k.get("revoked_at"))] for k in items]


def print_keys(items: list[dict[str, Any]], as_json: bool) -> None:
    """The list of keys, as a table (or the service's items as JSON), the same from the
    service and from the store."""
    if as_json:
        _json(items)
        return
    _table(KEY_HEADERS, key_rows(items))
    print(f"{len(items)} key(s); times in UTC; a last use is recorded at most once a minute", file=sys.stderr)


def print_revoked(key: dict[str, Any]) -> None:
    print(f"key {key['id']} ({key['role']}) revoked {display.when(key.get('revoked_at'))} UTC")


def keys_list(client: Client, args: argparse.Namespace) -> int:
    print_keys(list(_pages(client, "/v1/keys")), args.json)
    return 0


KEY_ID = re.compile(r"^[A-Za-z0-9_-]{1,40}$")


def check_key_id(key_id: str) -> None:
    if not KEY_ID.match(key_id):
        raise LocalError(f"{key_id!r} is not a key id (e.g. k_0123456789abcdef; see: keys list)")


def keys_revoke(client: Client, args: argparse.Namespace) -> int:
    check_key_id(args.key_id)
    print_revoked(client.request("DELETE", f"/v1/keys/{args.key_id}", idempotent=True))
    return 0
