"""``curvekeeper references list|show|create|patch|retire``: the reference instruments.

``create`` and ``patch`` take the fields as flags, or from a JSON or TOML file (``--file``;
the flags given win over the file's fields). TOML dates may be written bare
(``due_on = 2027-03-01``).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import tomllib
from pathlib import Path
from typing import Any

from ..client import Client
from .common import CAUTION, CHANNEL_ID, LocalError, _confirm, _json, _num, _pages, _runner, _table

#: the fields a flag may set: the flag's type (dates stay text: the service checks them) and help
FIELDS: dict[str, tuple[type, str]] = {
    "description": (str, "what the instrument is"),
    "unit": (str, "the unit its uncertainty is stated in (the channels' output unit)"),
    "expanded_uncertainty": (float, "U from the certificate (with --coverage-factor; normal)"),
    "coverage_factor": (float, "k stated with U (default 2)"),
    "standard_uncertainty": (float, "u itself (normal), instead of U and k"),
    "half_width": (float, "a, the half-width of a rectangular or triangular distribution"),
    "distribution": (str, "normal (default), or rectangular / triangular with --half-width"),
    "certificate": (str, "the calibration certificate's id"),
    "calibrated_on": (str, "the day it was calibrated, YYYY-MM-DD"),
    "due_on": (str, "the day its calibration is due again, YYYY-MM-DD"),
    "note": (str, "traceability: to which standard, by whom"),
}
DUE_WORDS = {"ok": "ok", "due_soon": "due soon", "overdue": "OVERDUE"}


def _rid(value: str) -> str:
    if not CHANNEL_ID.match(value):
        raise LocalError(f"{value!r} is not a reference id (lower-case letters, digits, '.', '_', '-')")
    return value


def _from_file(path: str | None) -> dict[str, Any]:
    """The fields of a JSON or TOML file (by its suffix), dates as ISO text."""
    if path is None:
        return {}
    p = Path(path)
    text = p.read_text(encoding="utf-8")
    try:
        data = tomllib.loads(text) if p.suffix.lower() == ".toml" else json.loads(text)
    except (tomllib.TOMLDecodeError, json.JSONDecodeError) as exc:
        raise LocalError(f"{p}: not valid {'TOML' if p.suffix.lower() == '.toml' else 'JSON'}: {exc}") from exc
    if not isinstance(data, dict):
        raise LocalError(f"{p}: must hold one object (a table) of reference fields")
    return {k: v.isoformat() if isinstance(v, dt.date) else v for k, v in data.items()}


def _body(args: argparse.Namespace) -> dict[str, Any]:
    body = _from_file(args.file)
    body.update({name: getattr(args, name) for name in FIELDS if getattr(args, name, None) is not None})
    return body


def _stated(r: dict[str, Any]) -> str:
    if r["distribution"] == "normal":
        return f"U {_num(r['expanded_uncertainty'], 4)}, k {_num(r['coverage_factor'], 4)}"
    return f"+-{_num(r['half_width'], 4)} {r['distribution']}"


def _show(r: dict[str, Any]) -> None:
    rows = [["id", r["id"]], ["description", r["description"]], ["unit", r["unit"]],
            ["standard uncertainty", f"{_num(r['standard_uncertainty'], 6)} {r['unit']}"],
            ["stated as", _stated(r)], ["certificate", r["certificate"]], ["calibrated on", r["calibrated_on"]],
            ["due on", r["due_on"]], ["due state", "retired" if r["retired"] else DUE_WORDS[r["due_state"]]],
            ["note", r["note"]]]
    _table(["field", "value"], rows)


def references_list(client: Client, args: argparse.Namespace) -> int:
    retired = "true" if args.retired else ("false" if args.in_use else None)
    items = list(_pages(client, "/v1/references", due_state=args.due_state, retired=retired))
    if args.json:
        _json(items)
        return 0
    rows = [[r["id"], "retired" if r["retired"] else DUE_WORDS[r["due_state"]], r["due_on"],
             f"{_num(r['standard_uncertainty'], 4)} {r['unit']}", _stated(r), r["certificate"]] for r in items]
    _table(["reference", "state", "due on", "u", "stated as", "certificate"], rows)
    return 0


def references_show(client: Client, args: argparse.Namespace) -> int:
    r = client.request("GET", f"/v1/references/{_rid(args.reference)}")
    if args.json:
        _json(r)
    else:
        _show(r)
    return 0


def references_create(client: Client, args: argparse.Namespace) -> int:
    body = _body(args)
    if args.id is not None:
        body["id"] = args.id
    if not isinstance(body.get("id"), str):
        raise LocalError("give the reference's id: --id, or \"id\" in --file")
    _rid(body["id"])
    r = client.request("POST", "/v1/references", json=body, idempotent=False)
    print(f"created reference {r['id']}")
    _show(r)
    return 0


def references_patch(client: Client, args: argparse.Namespace) -> int:
    body = _body(args)
    if not body:
        raise LocalError("nothing to change: give a field flag or --file")
    r = client.request("PATCH", f"/v1/references/{_rid(args.reference)}", json=body, idempotent=False)
    print(f"changed reference {r['id']}: {', '.join(sorted(body))}")
    _show(r)
    return 0


def references_retire(client: Client, args: argparse.Namespace) -> int:
    rid = _rid(args.reference)
    r = client.request("GET", f"/v1/references/{rid}")
    print(f"{rid}: retire it for good; no new sample or calibration may name it (its records stay)")
    print(f"  {CAUTION}")
    _confirm(f"Retire {rid} ({r['certificate']}, due {r['due_on']})?", args.yes)
    body: dict[str, Any] = {"retired": True}
    if args.note is not None:
        body["note"] = args.note
    client.request("PATCH", f"/v1/references/{rid}", json=body, idempotent=False)
    print(f"retired {rid}")
    return 0


def _field_flags(p: argparse.ArgumentParser) -> None:
    p.add_argument("--file", help="the fields from a JSON or TOML file (flags win)")
    for name, (kind, text) in FIELDS.items():
        p.add_argument("--" + name.replace("_", "-"), dest=name, type=kind, help=text,
                       choices=["normal", "rectangular", "triangular"] if name == "distribution" else None)


def add(sub: Any, common: list[argparse.ArgumentParser]) -> None:
    """Register ``references ...`` on the ``curvekeeper`` sub-parsers."""
    rf = sub.add_parser("references", help="reference instruments: list, show, create, patch, retire (service client)")
    rs = rf.add_subparsers(dest="references_command", required=True)
    ls = rs.add_parser("list", parents=common, help="all reference instruments with their due state")
    ls.add_argument("--due-state", choices=["ok", "due_soon", "overdue"], help="only those in this due state")
    which = ls.add_mutually_exclusive_group()
    which.add_argument("--retired", action="store_true", help="only retired ones")
    which.add_argument("--in-use", action="store_true", help="only those not retired")
    ls.add_argument("--json", action="store_true", help="the service's items as JSON")
    ls.set_defaults(func=_runner(references_list))
    show = rs.add_parser("show", parents=common, help="one reference instrument")
    show.add_argument("reference", help="the reference's id")
    show.add_argument("--json", action="store_true", help="the service's JSON answer")
    show.set_defaults(func=_runner(references_show))
    cr = rs.add_parser("create", parents=common, help="add a reference instrument (U with k, u, or a half-width)")
    cr.add_argument("--id", help="the reference's id (lower-case letters, digits, '.', '_', '-')")
    _field_flags(cr)
    cr.set_defaults(func=_runner(references_create))
    pa = rs.add_parser("patch", parents=common, help="change fields of a reference instrument")
    pa.add_argument("reference", help="the reference's id")
    _field_flags(pa)
    pa.set_defaults(func=_runner(references_patch))
    rt = rs.add_parser("retire", parents=common, help="retire a reference instrument for good (asks unless --yes)")
    rt.add_argument("reference", help="the reference's id")
    rt.add_argument("--note", help="why (replaces its note)")
    rt.add_argument("--yes", action="store_true", help="do not ask (needed without a terminal)")
    rt.set_defaults(func=_runner(references_retire))
