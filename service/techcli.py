"""The technician's commands: a client of a running service.

``curvekeeper channels list``, ``channels show``, ``curve``, ``snapshots list|take|diff``,
``rollback``, ``calibrate``, ``samples export|load``. The service's address comes from
``--url`` (default ``$CURVEKEEPER_URL`` or http://127.0.0.1:8000); the key only from the
environment variable ``CURVEKEEPER_KEY``, never from a flag, so it stays out of shell history
and process lists.

Exit codes: 0 done, 1 the service refused (its message is shown), 2 a usage or local error
(no key, a bad CSV file, no confirmation), 3 the service could not be reached.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import os
import re
import sys
from collections.abc import Callable, Iterator, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any, TextIO
from urllib.parse import urlencode

import httpx

from .client import Client, ClientError

__all__ = ["add_commands"]

DEFAULT_URL = "http://127.0.0.1:8000"
CHANNEL_ID = re.compile(r"^[a-z0-9._-]{1,128}$")
PAGE = 1000  # the service's largest page
DIFF_POINTS = 201  # grid points over one input's range for curve differences; several inputs: <= 4096 in all
EXPORT_FIELDS = ["seq", "t", "received_at", "source", "source_seq", "y", "residual", "accepted", "reason"]


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
    else:
        _err(f"the service answered {exc.status} {exc.code}: {exc.message}")
    return 1


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


def _grid(inputs: list[dict[str, Any]]) -> list[Any]:
    """Points over the declared input ranges: a list of numbers for one input, of lists for several."""
    import numpy as np

    if len(inputs) == 1:
        return [float(v) for v in np.linspace(inputs[0]["min"], inputs[0]["max"], DIFF_POINTS)]
    per_axis = max(3, int(round(4096 ** (1.0 / len(inputs)))))
    axes = [np.linspace(i["min"], i["max"], per_axis) for i in inputs]
    mesh = np.meshgrid(*axes, indexing="ij")
    return [list(map(float, row)) for row in np.stack([m.ravel() for m in mesh], axis=1)]


def _largest_difference(client: Client, channel: str, a: int | None, b: int | None
                        ) -> tuple[dict[str, Any], str]:
    """The channel and a line on max |f_a(x) - f_b(x)| over its input range and where it is;
    ``None`` as a snapshot is the current state."""
    cfg = client.get_channel(channel)
    grid = _grid(cfg["inputs"])
    ya = client.predict(channel, grid, snapshot=a)["y"]
    yb = client.predict(channel, grid, snapshot=b)["y"]
    for name, ys in ((a, ya), (b, yb)):
        if all(v is None for v in ys):
            what = "the current curve" if name is None else f"snapshot {name}"
            return cfg, (f"{what} has no finite values over the input range (not calibrated yet?), "
                         "so it cannot be compared")
    best: float | None = None
    where: Any = None
    skipped = 0
    for x, p, q in zip(grid, ya, yb, strict=True):
        if p is None or q is None:
            skipped += 1
            continue
        d = abs(p - q)
        if best is None or d > best:
            best, where = d, x
    if best is None:
        return cfg, "the two curves have no finite values at the same inputs: they cannot be compared"
    line = f"largest curve difference {_num(best)} {_unit(cfg)}".rstrip() + f" at {_at(cfg, where)}"
    if skipped:
        line += f" ({skipped} of {len(grid)} grid points without a finite value left out)"
    return cfg, line


def _at(cfg: dict[str, Any], x: Any) -> str:
    inputs = cfg["inputs"]
    xs = x if isinstance(x, list) else [x]
    return ", ".join(f"{i['name']} = {_num(v)} {i.get('unit') or ''}".rstrip() for i, v in zip(inputs, xs, strict=True))


# CSV files ------------------------------------------------------------------------------
def _x_columns(header: list[str], path: Path) -> list[str]:
    """``x`` or ``x1, x2, ...`` (in input order)."""
    if "x" in header:
        if any(re.fullmatch(r"x\d+", h) for h in header):
            raise LocalError(f"{path}: use either an x column or x1, x2, ... columns, not both")
        return ["x"]
    numbered = sorted((int(h[1:]), h) for h in header if re.fullmatch(r"x\d+", h))
    if not numbered or [n for n, _ in numbered] != list(range(1, len(numbered) + 1)):
        raise LocalError(f"{path}: the header needs x (one input) or x1, x2, ... (several inputs) and y")
    return [h for _, h in numbered]


def _number(text: str, path: Path, line: int, column: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise LocalError(f"{path} line {line}: {column} is not a number: {text!r}") from None
    if not math.isfinite(v):
        raise LocalError(f"{path} line {line}: {column} is not a finite number: {text!r}")
    return v


def read_points(path: Path, n_inputs: int, *, with_time: bool) -> list[dict[str, Any]]:
    """Rows of a CSV file with a header ``x,y`` or ``x1,...,xn,y`` (and ``t``, ISO-8601 with a time
    zone, when ``with_time``); other columns are ignored. ``{"x", "y"[, "t"], "row"}`` each."""
    with path.open(newline="", encoding="utf-8-sig") as f:
        reader = csv.reader(f)
        header = [h.strip().lower() for h in next(reader, [])]
        if not header:
            raise LocalError(f"{path}: empty file (expected a header line x,y)")
        if "y" not in header:
            raise LocalError(f"{path}: the header has no y column (expected x,y or x1,...,xn,y)")
        xcols = _x_columns(header, path)
        if len(xcols) != n_inputs:
            raise LocalError(f"{path}: {len(xcols)} input column(s), but the channel has {n_inputs} input(s)")
        index = {h: i for i, h in enumerate(header)}
        ti = index.get("t") if with_time else None
        rows: list[dict[str, Any]] = []
        for fields in reader:
            if not any(c.strip() for c in fields):
                continue
            line = reader.line_num
            if len(fields) < len(header):
                raise LocalError(f"{path} line {line}: {len(fields)} field(s), the header has {len(header)}")
            xs = [_number(fields[index[c]].strip(), path, line, c) for c in xcols]
            row: dict[str, Any] = {"x": xs[0] if n_inputs == 1 else xs,
                                   "y": _number(fields[index["y"]].strip(), path, line, "y"),
                                   "row": len(rows) + 1}
            if ti is not None and fields[ti].strip():
                text = fields[ti].strip()
                try:
                    when = datetime.fromisoformat(text.replace("Z", "+00:00"))
                except ValueError:
                    raise LocalError(f"{path} line {line}: t is not an ISO-8601 time: {text!r}") from None
                if when.tzinfo is None:
                    raise LocalError(f"{path} line {line}: t needs a time zone (e.g. {text}Z): {text!r}")
                row["t"] = when.isoformat()
            rows.append(row)
    if not rows:
        raise LocalError(f"{path}: no data rows after the header")
    return rows


# channels -------------------------------------------------------------------------------
def channels_list(client: Client, args: argparse.Namespace) -> int:
    items = list(_pages(client, "/v1/channels", prefix=args.prefix, state=args.state))
    if args.json:
        _json(items)
        return 0
    rows = []
    for ch in items:
        drift = ch.get("drift") or {}
        rmse = ch.get("rmse")
        rows.append([ch["id"], str(drift.get("state") or "-"), str(drift.get("tolerance_state") or "-"),
                     str(ch.get("n_samples", 0)),
                     "-" if rmse is None else f"{_num(rmse, 4)} {_unit(ch)}".rstrip(),
                     str(ch.get("last_sample_at") or "-")])
    _table(["id", "drift", "tolerance", "samples", "rmse", "last sample"], rows)
    print(f"{len(rows)} channel(s)", file=sys.stderr)
    return 0


def channels_show(client: Client, args: argparse.Namespace) -> int:
    ch = client.get_channel(args.channel)
    if args.json:
        _json(ch)
        return 0
    out = ch.get("output", {})
    drift = ch.get("drift") or {}
    lines = [("id", ch["id"]), ("description", ch.get("description") or "-")]
    for i in ch.get("inputs", []):
        lines.append((f"input {i['name']}", f"{i.get('unit') or '-'}, range [{_num(i['min'])}, {_num(i['max'])}]"))
    transform = out.get("transform") or "none"
    extra = f", transform {transform} (offset {_num(out.get('offset'))})" if transform != "none" else ""
    lines += [
        ("output", f"{out.get('name', '-')} [{out.get('unit') or '-'}]{extra}"),
        ("basis", json.dumps(ch.get("basis"), sort_keys=True)),
        ("learner", json.dumps(ch.get("learner"), sort_keys=True)),
        ("samples", f"{ch.get('n_samples', 0)} ({ch.get('n_rejected', 0)} held back)"),
        ("rmse", "-" if ch.get("rmse") is None else f"{_num(ch['rmse'], 4)} {_unit(ch)}"),
        ("drift", f"{drift.get('state', '-')} ({drift.get('detector', '-')}, statistic "
                  f"{_num(drift.get('statistic'), 4)})"),
        ("tolerance", "-" if drift.get("tolerance") is None else
         f"{drift.get('tolerance_state') or '-'} (tolerance {_num(drift['tolerance'])} {_unit(ch)}, "
         f"largest change {_num(drift.get('max_curve_change'), 4)})"),
        ("version", str(ch.get("version"))),
        ("last sample", str(ch.get("last_sample_at") or "-")),
        ("created", str(ch.get("created_at") or "-")),
    ]
    width = max(len(k) for k, _ in lines)
    for k, v in lines:
        print(f"{k.ljust(width)}  {v}")
    return 0


# curve ----------------------------------------------------------------------------------
def _term_name(term: Any, basis: dict[str, Any], names: list[str]) -> str:
    kind = basis.get("kind")
    if kind == "log_poly":
        return "1" if term == 0 else f"ln({names[0]})" if term == 1 else f"ln({names[0]})^{term}"
    if isinstance(term, list):
        parts = [n if e == 1 else f"{n}^{e}" for n, e in zip(names, term, strict=False) if e]
        return "*".join(parts) or "1"
    return str(term)


def _coefficients(report: dict[str, Any], cfg: dict[str, Any]) -> list[list[str]]:
    names = [i["name"] for i in cfg.get("inputs", [])]
    basis = report.get("basis") or cfg.get("basis") or {}
    if report.get("raw_coefficients") is not None:
        terms, coef, sd = report.get("raw_terms") or [], report["raw_coefficients"], report.get("raw_coefficient_sd")
        labels = [_term_name(t, basis, names) for t in terms] or [str(i) for i in range(len(coef))]
    else:
        coef, sd = report.get("weights") or [], report.get("weight_sd")
        labels = [f"w{i}" for i in range(len(coef))]
    return [[lab, _num(c, 10), _num(sd[i] if sd else None, 4)] for i, (lab, c) in enumerate(zip(labels, coef,
                                                                                                 strict=False))]


def _space(cfg: dict[str, Any]) -> str:
    out = cfg.get("output", {})
    t = out.get("transform") or "none"
    if t == "none":
        return f"y [{out.get('unit') or '-'}]"
    off = _num(out.get("offset") or 0.0)
    return f"1/(y + {off})" if t == "reciprocal" else f"ln(y + {off})"


def curve(client: Client, args: argparse.Namespace) -> int:
    if args.points < 2:
        raise LocalError("--points must be at least 2")
    c = client.request("GET", f"/v1/channels/{args.channel}/curve?{urlencode({'points': args.points})}")
    if args.json:
        _json(c)
        return 0
    inputs, unit = c["inputs"], _unit(c)
    heads = [f"{i['name']} [{i.get('unit') or '-'}]" for i in inputs] + [f"y [{unit}]", f"u [{unit}]"]
    rows = []
    for p in c["points"]:
        xs = p["x"] if isinstance(p["x"], list) else [p["x"]]
        rows.append([_num(v) for v in xs] + [_num(p["y"]), _num(p["u"], 3)])
    _table(heads, rows)
    print(f"\nk = {_num(c.get('k'))}; {c.get('n_samples')} samples, rmse "
          f"{_num(c.get('rmse'), 4)} {unit}; drift {c.get('drift', {}).get('state')}; version {c.get('version')}")
    coef = _coefficients(c, c)
    if coef:
        kind = "power series" if c.get("poly_coefficients") is not None else str(c["basis"].get("kind"))
        print(f"coefficients ({kind}, raw input units) of {_space(c)}:")
        _table(["term", "coefficient", "s.d."], coef)
    return 0


# snapshots ------------------------------------------------------------------------------
def snapshots_list(client: Client, args: argparse.Namespace) -> int:
    items = list(_pages(client, f"/v1/channels/{args.channel}/snapshots"))
    if args.json:
        _json(items)
        return 0
    _table(["id", "reason", "version", "samples", "created", "label"],
           [[str(s["id"]), str(s.get("reason") or "-"), str(s.get("version")), str(s.get("n_samples")),
             str(s.get("created_at") or "-"), str(s.get("label") or "")] for s in items])
    return 0


def snapshots_take(client: Client, args: argparse.Namespace) -> int:
    s = client.take_snapshot(args.channel, args.label)
    print(f"snapshot {s['id']} of {args.channel} taken (version {s.get('version')}, {s.get('n_samples')} samples)")
    return 0


def snapshots_diff(client: Client, args: argparse.Namespace) -> int:
    _, line = _largest_difference(client, args.channel, args.a, args.b)
    print(f"{args.channel}: snapshot {args.a} vs snapshot {args.b}: {line}")
    return 0


def rollback(client: Client, args: argparse.Namespace) -> int:
    snap = client.request("GET", f"/v1/channels/{args.channel}/snapshots/{args.snapshot}")
    cfg, line = _largest_difference(client, args.channel, None, args.snapshot)
    label = f" '{snap['label']}'" if snap.get("label") else ""
    print(f"{args.channel}: roll back from version {cfg.get('version')} to snapshot {args.snapshot}{label} "
          f"({snap.get('reason')}, version {snap.get('version')}, {snap.get('created_at')})")
    print(f"  now vs the snapshot: {line}")
    print("  the current state is snapshotted first, so this can itself be rolled back")
    _confirm(f"Roll {args.channel} back to snapshot {args.snapshot}?", args.yes)
    out = client.rollback(args.channel, args.snapshot)
    print(f"rolled back to snapshot {args.snapshot}; the state before is kept as snapshot "
          f"{out.get('snapshot_before')} (version now {out.get('version')})")
    return 0


# calibrate ------------------------------------------------------------------------------
def calibrate(client: Client, args: argparse.Namespace) -> int:
    cfg = client.get_channel(args.channel)
    path = Path(args.file)
    points = read_points(path, len(cfg["inputs"]), with_time=False)
    print(f"{args.channel}: fit {len(points)} point(s) from {path} by least squares; this replaces the "
          f"current curve (version {cfg.get('version')}, {cfg.get('n_samples')} samples learned)")
    print("  the current state is kept as a snapshot, so the calibration can be rolled back")
    _confirm(f"Calibrate {args.channel} now?", args.yes)
    body: dict[str, Any] = {"points": [{"x": p["x"], "y": p["y"]} for p in points]}
    if args.label is not None:
        body["label"] = args.label
    r = client.request("POST", f"/v1/channels/{args.channel}/calibrate", json=body, idempotent=False)
    unit = _unit(cfg)
    print(f"calibrated {args.channel}: {r.get('n')} points, version {r.get('version')}")
    coef = _coefficients(r, cfg)
    if coef:
        print(f"coefficients of {_space(cfg)} (raw input units):")
        _table(["term", "coefficient", "s.d."], coef)
    transformed = (cfg.get("output", {}).get("transform") or "none") != "none"
    print(f"residual s.d.  {_num(r.get('residual_sd'), 4)}{' (fitted space)' if transformed else ' ' + unit}")
    if r.get("rmse_output") is not None:
        print(f"rms residual   {_num(r['rmse_output'], 4)} {unit}")
    print(f"R-squared      {_num(r.get('r_squared'), 8)}")
    change = r.get("max_curve_change")
    print(f"largest curve change  {_num(change, 4)} {unit}" if change is not None else
          "largest curve change  - (no earlier curve to compare)")
    print(f"undo with: curvekeeper rollback {args.channel} {r.get('snapshot_before')}")
    return 0


# samples --------------------------------------------------------------------------------
def samples_export(client: Client, args: argparse.Namespace) -> int:
    cfg = client.get_channel(args.channel)
    d = len(cfg["inputs"])
    xcols = ["x"] if d == 1 else [f"x{i + 1}" for i in range(d)]
    fields = EXPORT_FIELDS[:5] + xcols + EXPORT_FIELDS[5:]

    def write(f: TextIO) -> int:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(fields)
        n = 0
        for s in _pages(client, f"/v1/channels/{args.channel}/samples"):
            xs = s["x"] if isinstance(s["x"], list) else [s["x"]]
            w.writerow([s["seq"], s.get("t") or "", s.get("received_at") or "", s.get("source") or "",
                        "" if s.get("source_seq") is None else s["source_seq"], *map(repr, map(float, xs)),
                        repr(float(s["y"])), "" if s.get("residual") is None else repr(float(s["residual"])),
                        "true" if s.get("accepted") else "false", s.get("reason") or ""])
            n += 1
        return n

    if args.out is None:
        n = write(sys.stdout)
        print(f"{n} sample(s) of {args.channel}", file=sys.stderr)
        return 0
    target = Path(args.out)
    part = target.with_name(target.name + ".part")
    try:
        with part.open("w", newline="", encoding="utf-8") as f:
            n = write(f)
        part.replace(target)
    finally:
        part.unlink(missing_ok=True)
    print(f"{n} sample(s) of {args.channel} written to {target}", file=sys.stderr)
    return 0


def samples_load(client: Client, args: argparse.Namespace) -> int:
    from tqdm import tqdm

    if args.batch < 1:
        raise LocalError("--batch must be at least 1")
    path = Path(args.file)
    source = args.source or f"csv:{path.name}"[:128]
    cfg = client.get_channel(args.channel)
    rows = read_points(path, len(cfg["inputs"]), with_time=True)
    accepted = duplicates = rejected = done = 0
    try:
        with tqdm(total=len(rows), unit="sample", desc=args.channel, disable=None, file=sys.stderr) as bar:
            for start in range(0, len(rows), args.batch):
                chunk = rows[start:start + args.batch]
                batch = [{k: v for k, v in r.items() if k != "row"} | {"seq": r["row"]} for r in chunk]
                out = client.post_samples(args.channel, batch, source=source)
                accepted += int(out["accepted"])
                duplicates += int(out["duplicates"])
                rejected += len(out.get("rejected") or [])
                done += len(chunk)
                bar.update(len(chunk))
    except ClientError:
        print(f"stopped after {done} of {len(rows)} rows; run the same command again to resume "
              f"(stored rows come back as duplicates)", file=sys.stderr)
        raise
    print(f"{args.channel}: {len(rows)} rows from {path} (source {source!r}): {accepted} accepted, "
          f"{duplicates} duplicates, {rejected} rejected (stored, not learned)")
    return 0


# the parser -----------------------------------------------------------------------------
def _common() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("service")
    g.add_argument("--url", help=f"the service (default $CURVEKEEPER_URL or {DEFAULT_URL}); "
                                 "the key is read from $CURVEKEEPER_KEY")
    g.add_argument("--timeout", type=float, default=30.0, help="seconds per request (default 30)")
    g.add_argument("--retries", type=int, default=3, help="retries on busy or unreachable service (default 3)")
    return p


def add_commands(sub: Any) -> None:
    """Register the technician's commands on the ``curvekeeper`` sub-parsers."""
    common = [_common()]

    ch = sub.add_parser("channels", help="list channels or show one (service client)")
    ch_sub = ch.add_subparsers(dest="channels_command", required=True)
    ls = ch_sub.add_parser("list", parents=common, help="all channels (every page)")
    ls.add_argument("--prefix", help="only ids starting with this")
    ls.add_argument("--state", choices=["ok", "warning", "alarm", "out_of_tolerance"])
    ls.add_argument("--json", action="store_true", help="the service's items as JSON")
    ls.set_defaults(func=_runner(channels_list))
    show = ch_sub.add_parser("show", parents=common, help="one channel's configuration and summary")
    show.add_argument("channel")
    show.add_argument("--json", action="store_true")
    show.set_defaults(func=_runner(channels_show))

    cv = sub.add_parser("curve", parents=common, help="a channel's curve over its input range, with coefficients")
    cv.add_argument("channel")
    cv.add_argument("--points", type=int, default=11, help="points over the input range (default 11)")
    cv.add_argument("--json", action="store_true")
    cv.set_defaults(func=_runner(curve))

    sn = sub.add_parser("snapshots", help="list, take or compare a channel's snapshots (service client)")
    sn_sub = sn.add_subparsers(dest="snapshots_command", required=True)
    sl = sn_sub.add_parser("list", parents=common, help="a channel's snapshots")
    sl.add_argument("channel")
    sl.add_argument("--json", action="store_true")
    sl.set_defaults(func=_runner(snapshots_list))
    st = sn_sub.add_parser("take", parents=common, help="store a copy of the channel's current state")
    st.add_argument("channel")
    st.add_argument("--label")
    st.set_defaults(func=_runner(snapshots_take))
    sd = sn_sub.add_parser("diff", parents=common,
                           help="largest difference between two snapshots' curves over the input range")
    sd.add_argument("channel")
    sd.add_argument("a", type=int, metavar="SID_A")
    sd.add_argument("b", type=int, metavar="SID_B")
    sd.set_defaults(func=_runner(snapshots_diff))

    rb = sub.add_parser("rollback", parents=common, help="restore a snapshot (asks first unless --yes)")
    rb.add_argument("channel")
    rb.add_argument("snapshot", type=int, metavar="SID")
    rb.add_argument("--yes", action="store_true", help="do not ask (needed without a terminal)")
    rb.set_defaults(func=_runner(rollback))

    cal = sub.add_parser("calibrate", parents=common,
                         help="least-squares fit on bench points from a CSV file (x,y or x1,...,xn,y)")
    cal.add_argument("channel")
    cal.add_argument("file", metavar="FILE.csv")
    cal.add_argument("--label", help="what the calibration was (kept with its snapshots and event)")
    cal.add_argument("--yes", action="store_true", help="do not ask (needed without a terminal)")
    cal.set_defaults(func=_runner(calibrate))

    sa = sub.add_parser("samples", help="export or bulk-load a channel's samples (service client)")
    sa_sub = sa.add_subparsers(dest="samples_command", required=True)
    ex = sa_sub.add_parser("export", parents=common, help="all stored samples as CSV")
    ex.add_argument("channel")
    ex.add_argument("--out", help="file to write (default: standard output)")
    ex.set_defaults(func=_runner(samples_export))
    ld = sa_sub.add_parser("load", parents=common,
                           help="post x,y[,t] rows from a CSV file in batches; re-running resumes")
    ld.add_argument("channel")
    ld.add_argument("file", metavar="FILE.csv")
    ld.add_argument("--source", help="source name; with seq = row number it makes a re-run idempotent "
                                     "(default csv:<file name>)")
    ld.add_argument("--batch", type=int, default=1000, help="rows per request (default 1000)")
    ld.set_defaults(func=_runner(samples_load))
