"""The technician's commands, one function per command: (client, args) -> exit code."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any, TextIO
from urllib.parse import urlencode

from .. import display
from ..client import Client, ClientError
from ..csvcells import TextSafeWriter
from .common import CAUTION, EXPORT_FIELDS, LocalError, _confirm, _difference, _json, _num, _pages, _table, _unit
from .csvfiles import read_points


def report(client: Client, args: argparse.Namespace) -> int:
    """The PDF report of calibration record CAL (default: the channel's latest, by its time)."""
    cal = args.cal
    if cal is None:
        records = list(_pages(client, f"/v1/channels/{args.channel}/calibrations"))
        if not records:
            raise LocalError(f"channel {args.channel} has no calibration records yet")
        cal = max(records, key=lambda r: (str(r.get("at") or ""), str(r["id"])))["id"]
    pdf = client.request("GET", f"/v1/channels/{args.channel}/calibrations/{cal}/report.pdf", raw=True)
    if not isinstance(pdf, bytes) or not pdf.startswith(b"%PDF-"):
        raise LocalError("the service's answer is not a PDF: is it a curvekeeper service?")
    Path(args.out).write_bytes(pdf)
    print(f"wrote {args.out}: the report of calibration {cal} of channel {args.channel} ({len(pdf)} bytes)")
    print(CAUTION)
    return 0


def channels_list(client: Client, args: argparse.Namespace) -> int:
    items = list(_pages(client, "/v1/channels", prefix=args.prefix, state=args.state, archived=args.archived,
                        due_state=args.due))
    items = [dict(c) for c in display.fleet_order(items)]
    if args.json:
        _json(items)
        return 0
    rows = []
    for ch in items:
        drift = ch.get("drift") or {}
        rmse = ch.get("rmse")
        state = str(ch.get("state") or drift.get("state") or "-")
        if ch.get("service_state") == "out_of_service":
            state += ",out_of_service"
        if ch.get("stale"):
            state += ",stale"
        if ch.get("archived"):
            state = f"archived({state})"
        rows.append([ch["id"], state, str(drift.get("tolerance_state") or "-"),
                     str(ch.get("n_samples", 0)),
                     "-" if rmse is None else f"{_num(rmse, 4)} {_unit(ch)}".rstrip(),
                     display.when(ch.get("last_sample_at")),
                     f"{ch['due_on']} {ch['due_state']}" if ch.get("due_on") else "-"])
    _table(["id", "drift", "tolerance", "samples", "rmse", "last sample (UTC)", "calibration due"], rows)
    attention = sum(1 for ch in items if display.rank(ch) < display.ATTENTION)
    print(f"{len(rows)} channel(s), {attention} needing attention (listed first)", file=sys.stderr)
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
        ("last sample", f"{display.when(ch.get('last_sample_at'))} UTC"),
        ("created", f"{display.when(ch.get('created_at'))} UTC"),
    ]
    if ch.get("archived"):
        lines.append(("archived", f"{display.when(ch.get('archived_at'))} UTC: history kept, no samples nor changes "
                                  "until unarchived"))
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
    heads = [f"{i['name']} [{i.get('unit') or '-'}]" for i in inputs] + [f"y [{unit}]", f"u [{unit}]",
                                                                          f"U [{unit}]", "k"]
    rows = []
    for p in c["points"]:
        xs = p["x"] if isinstance(p["x"], list) else [p["x"]]
        rows.append([_num(v) for v in xs] + [_num(p["y"]), _num(p["u"], 3), _num(p.get("U"), 3),
                                             _num(p.get("k"), 3)])
    _table(heads, rows)
    print(f"\nU = k u; {c.get('n_samples')} samples, rmse "
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
             display.when(s.get("created_at")), str(s.get("label") or "")] for s in items])
    return 0


def snapshots_take(client: Client, args: argparse.Namespace) -> int:
    s = client.take_snapshot(args.channel, args.label)
    print(f"snapshot {s['id']} of {args.channel} taken (version {s.get('version')}, {s.get('n_samples')} samples)")
    return 0


def snapshots_diff(client: Client, args: argparse.Namespace) -> int:
    _, line = _difference(client, args.channel, args.a, args.b)
    print(f"{args.channel}: snapshot {args.a} vs snapshot {args.b}: {line}")
    return 0


def rollback(client: Client, args: argparse.Namespace) -> int:
    cfg = client.get_channel(args.channel)
    snap, line = _difference(client, args.channel, args.snapshot, None)
    label = f" '{snap['label']}'" if snap.get("label") else ""
    print(f"{args.channel}: roll back from version {cfg.get('version')} to snapshot {args.snapshot}{label} "
          f"({snap.get('reason')}, version {snap.get('version')}, {snap.get('created_at')})")
    print(f"  now vs the snapshot: {line}")
    print("  the current state is snapshotted first, so this can itself be rolled back")
    print("  the reference curve " + ("becomes the restored one" if args.set_reference
                                      else "stays the last calibration's (--set-reference to change it)"))
    print(f"  {CAUTION}")
    _confirm(f"Roll {args.channel} back to snapshot {args.snapshot}?", args.yes)
    out = client.rollback(args.channel, args.snapshot, set_reference=args.set_reference, reason=args.reason)
    print(f"rolled back to snapshot {args.snapshot}; the state before is kept as snapshot "
          f"{out.get('snapshot_before')} (version now {out.get('version')}); reference {out.get('reference_curve')}")
    return 0


# calibrate ------------------------------------------------------------------------------
def _as_found(record: dict[str, Any], unit: str) -> None:
    """The would-be record's as-found table (the current curve at each point) and verdicts."""
    print(f"as found (the current curve at each point, {record['decision_rule']} decision rule):")
    _table(["x", "reference", "indicated", "error", "tolerance", "verdict"],
           [[_num(p["x"]), _num(p["reference_value"]), _num(p["indicated"]), _num(p["error"], 4),
             _num(p["tolerance"], 4), p["verdict"]] for p in record["as_found"]])
    print(f"verdict as found: {record['as_found_verdict']}, as left: {record['verdict']} ({unit or 'output units'}); "
          f"next interval suggested {record['interval_suggestion']['days']} days")


def calibrate(client: Client, args: argparse.Namespace) -> int:
    cfg = client.get_channel(args.channel)
    path = Path(args.file)
    points = read_points(path, len(cfg["inputs"]), with_time=False)
    print(f"{args.channel}: fit {len(points)} point(s) from {path} by least squares; this replaces the "
          f"current curve (version {cfg.get('version')}, {cfg.get('n_samples')} samples learned)")
    print("  the current state is kept as a snapshot, so the calibration can be rolled back")
    body: dict[str, Any] = {"points": [{"x": p["x"], "y": p["y"]} for p in points]}
    if args.label is not None:
        body["label"] = args.label
    if args.reason is not None:
        body["reason"] = args.reason
    if args.reference is not None:
        body.update(reference=args.reference, allow_overdue_reference=args.allow_overdue_reference)
    unit = _unit(cfg)
    preview = client.request("POST", f"/v1/channels/{args.channel}/calibrate", json={**body, "dry_run": True})
    _as_found(preview["record"], unit)
    print(f"  {CAUTION}")
    if args.dry_run:
        print("dry run: nothing applied")
        return 0
    _confirm(f"Calibrate {args.channel} now?", args.yes)
    r = client.request("POST", f"/v1/channels/{args.channel}/calibrate", json=body, idempotent=False)
    print(f"calibrated {args.channel}: {r.get('n')} points, version {r.get('version')}; record "
          f"{r.get('calibration')}, as left {r['record']['verdict']}")
    if r.get("reference"):
        ref = r["reference"]
        print(f"against reference {ref['id']} ({ref['certificate']}, due {ref['due_on']}"
              f"{', OVERDUE: allowed' if ref['overdue'] else ''})")
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
        w = TextSafeWriter(f, fields)  # a formula-like source opens as text in a spreadsheet
        w.writerow(fields)
        n = 0
        for s in _pages(client, f"/v1/channels/{args.channel}/samples"):
            xs = s["x"] if isinstance(s["x"], list) else [s["x"]]
            w.writerow([s["seq"], s.get("t") or "", s.get("received_at") or "", s.get("source") or "",
                        "" if s.get("source_seq") is None else s["source_seq"], *map(repr, map(float, xs)),
                        repr(float(s["y"])), "" if s.get("residual") is None else repr(float(s["residual"])),
                        "true" if s.get("accepted") else "false", s.get("reason") or "", s.get("reference") or ""])
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
