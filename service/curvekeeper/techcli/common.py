"""Shared pieces of the technician's commands: errors, paging, tables, confirmation,
curve differences."""

from __future__ import annotations

import argparse
import json
import os
import re
import sys
from collections.abc import Callable, Iterator, Sequence
from typing import Any, TextIO
from urllib.parse import urlencode

import httpx

from ..client import Client, ClientError
from ..errors import field_path

#: said where a technician acts on a curve (rollback, calibrate): the service is no calibration
CAUTION = ("Caution: curvekeeper supports calibration work; it does not replace traceable, accredited "
           "calibration nor the regulations where the sensor is used.")

DEFAULT_URL = "http://127.0.0.1:8000"
CHANNEL_ID = re.compile(r"^[a-z0-9._-]{1,128}$")
PAGE = 1000  # the service's largest page
EXPORT_FIELDS = ["seq", "t", "received_at", "source", "source_seq", "y", "residual", "accepted", "reason",
                 "reference"]


class LocalError(Exception):
    """A usage or local problem (exit 2): no key, a bad file, no confirmation."""


Handler = Callable[[Client, argparse.Namespace], int]


# plumbing -------------------------------------------------------------------------------
def _err(text: str) -> None:
    print(f"curvekeeper: {text}", file=sys.stderr)


def _refused(exc: ClientError, url: str) -> int:
    """One line on stderr for a failed request; the exit code."""
    if exc.status is None:
        _err(f"cannot reach the service at {url}: {exc.message}")
        return 3
    if exc.status == 401:
        _err(f"the service did not accept the key in CURVEKEEPER_KEY (401 {exc.code}): {exc.message}")
    elif exc.status == 403:
        _err(f"not allowed with this key (403 {exc.code}): {exc.message}")
    elif exc.status == 404:
        _err(f"not found (404 {exc.code}): {exc.message}")
    elif exc.status in (400, 422):
        field = exc.details.get("field") if isinstance(exc.details, dict) else None
        where = f" [{field}]" if field else ""
        _err(f"the service refused the request ({exc.status} {exc.code}){where}: {exc.message}")
        problems = _field_problems(exc.details)
        if len(problems) > 1:  # the message names the first; list them all
            print("\n".join(f"  {p}" for p in problems), file=sys.stderr)
    else:
        _err(f"the service answered {exc.status} {exc.code}: {exc.message}")
    return 1


def _field_problems(details: Any) -> list[str]:
    """A validation error's details (``[{"loc", "msg"}, ...]``) as "field: what is wrong" lines."""
    if not isinstance(details, list):
        return []
    out = []
    for d in details:
        if isinstance(d, dict) and "msg" in d:
            loc = [int(p) if isinstance(p, str) and p.isdigit() else p for p in d.get("loc") or []]
            out.append(f"{field_path(loc) or 'request'}: {d['msg']}")
    return out


def _runner(handler: Handler) -> Callable[[argparse.Namespace], int]:
    def run(args: argparse.Namespace) -> int:
        url = args.url or os.environ.get("CURVEKEEPER_URL") or DEFAULT_URL
        key = os.environ.get("CURVEKEEPER_KEY", "").strip()
        if not key:
            _err("set CURVEKEEPER_KEY to your technician key (it is never taken from the command line)")
            return 2
        if not key.isascii() or not key.isprintable():
            _err("CURVEKEEPER_KEY holds characters a key never has; check the variable")
            return 2
        if not url.startswith(("http://", "https://")):
            _err(f"--url must start with http:// or https://, not {url!r}")
            return 2
        for name in ("channel",):
            value = getattr(args, name, None)
            if value is not None and not CHANNEL_ID.match(value):
                _err(f"{value!r} is not a channel id (lower-case letters, digits, '.', '_', '-')")
                return 2
        try:
            with Client(url.rstrip("/"), key, timeout=args.timeout, max_retries=args.retries) as client:
                return handler(client, args)
        except ClientError as exc:
            return _refused(exc, url)
        except LocalError as exc:
            _err(str(exc))
            return 2
        except httpx.InvalidURL as exc:
            _err(f"--url {url!r} is not a valid address: {exc}")
            return 2
        except (json.JSONDecodeError, KeyError) as exc:
            _err(f"unexpected answer from {url} ({exc!r}): is it a curvekeeper service?")
            return 1
        except OSError as exc:
            _err(f"{exc.filename or ''}: {exc.strerror or exc}" if exc.filename else str(exc))
            return 2
    return run


def _pages(client: Client, path: str, **params: Any) -> Iterator[dict[str, Any]]:
    """Every item of a paged list, following ``next_cursor``."""
    query = {k: v for k, v in params.items() if v is not None}
    query["limit"] = PAGE
    cursor: str | None = None
    while True:
        q = dict(query, cursor=cursor) if cursor else query
        page = client.request("GET", f"{path}?{urlencode(q)}")
        yield from page["items"]
        cursor = page.get("next_cursor")
        if not cursor:
            return


def _num(v: Any, digits: int = 6) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return str(v).lower()
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return f"{v:.{digits}g}"
    if isinstance(v, list):
        return "[" + ", ".join(_num(e, digits) for e in v) + "]"
    return str(v)


def _table(headers: Sequence[str], rows: Sequence[Sequence[str]], out: TextIO | None = None) -> None:
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]
    out = out or sys.stdout
    print("  ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True)).rstrip(), file=out)
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip(), file=out)


def _json(obj: Any) -> None:
    print(json.dumps(obj, indent=2, sort_keys=True))


def _confirm(question: str, yes: bool) -> None:
    """Go on with --yes, or after a 'y' on a terminal; otherwise LocalError."""
    if yes:
        return
    if not sys.stdin.isatty():
        raise LocalError("no terminal to confirm on: re-run with --yes to go ahead without asking")
    print(f"{question} [y/N] ", end="", file=sys.stderr, flush=True)
    answer = sys.stdin.readline().strip().lower()
    if answer not in ("y", "yes"):
        raise LocalError("not confirmed; nothing was changed")


def _unit(cfg: dict[str, Any]) -> str:
    return str(cfg.get("output", {}).get("unit") or "")


def _difference(client: Client, channel: str, snapshot: int, against: int | None
                ) -> tuple[dict[str, Any], str]:
    """The snapshot (as the service answers it) and a line on the largest difference between
    its curve and the current one, or snapshot ``against``'s: the service's figure and where."""
    query = "" if against is None else f"?{urlencode({'against': against})}"
    snap = client.request("GET", f"/v1/channels/{channel}/snapshots/{snapshot}{query}")
    d, cfg = snap["curve_difference"], snap["config"]
    if d["max"] is None:
        return snap, "the two curves have no finite values at the same inputs: they cannot be compared"
    line = f"largest curve difference {_num(d['max'])} {_unit(cfg)}".rstrip() + f" at {_at(cfg, d['at'])}"
    if d["left_out"]:
        line += f" ({d['left_out']} of {d['grid_points']} grid points without a finite value left out)"
    return snap, line


def _at(cfg: dict[str, Any], x: Any) -> str:
    inputs = cfg["inputs"]
    xs = x if isinstance(x, list) else [x]
    return ", ".join(f"{i['name']} = {_num(v)} {i.get('unit') or ''}".rstrip() for i, v in zip(inputs, xs, strict=True))


# CSV files ------------------------------------------------------------------------------
