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
from .csvfiles import read_samples


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
        ("residual s.d.", _residual_sd(ch)),
        ("operating range", "; ".join(f"{r['name']} [{_num(r['min'])}, {_num(r['max'])}] ({r['source']})"
                                      for r in ch.get("operating_range") or [])),
        ("drift", f"{drift.get('state', '-')} ({drift.get('detector', '-')}, statistic "
                  f"{_num(drift.get('statistic'), 4)})"),
        ("tolerance", "-" if drift.get("tolerance") is None else
         f"{drift.get('tolerance_state') or '-'} (tolerance {_num(drift['tolerance'])} {_unit(ch)}, "
         f"largest change {_num(drift.get('max_curve_change'), 4)})"),
        ("forecast", _forecast(ch.get("forecast"), _unit(ch))),
        ("calibration due", f"{ch['due_on']} {ch.get('due_state')} (every {ch.get('recalibration_interval_days')} "
                            f"days; decision rule {ch.get('decision_rule')})" if ch.get("due_on") else
         f"never calibrated (decision rule {ch.get('decision_rule')})"),
        ("service", str(ch.get("service_state", "-")).replace("_", " ")),
        ("reporting", "not watched (no expected_interval)" if not ch.get("expected_interval") else
         f"{'stale since ' + display.when(ch.get('stale_since')) + ' UTC' if ch.get('stale') else 'ok'} "
         f"(a sample expected every {_num(ch['expected_interval'])} s)"),
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


def _forecast(f: dict[str, Any] | None, unit: str) -> str:
    """The forecast of when the channel leaves tolerance, in words (as the pages say it)."""
    if not f:
        return "- (no tolerance, or too short a trace since the last calibration)"
    if f.get("not_within_days") is not None:
        return f"not within {f['not_within_days']} days (drift {_num(f.get('rate'), 3)} {unit}/day)"
    return (f"leaves tolerance on {str(f.get('leaves_tolerance_on'))[:10]} (95 % interval "
            f"{str(f.get('low'))[:10]} to {str(f.get('high'))[:10]}; drift {_num(f.get('rate'), 3)} {unit}/day)")


# curve ----------------------------------------------------------------------------------
def _residual_sd(ch: dict[str, Any]) -> str:
    """The residual s.d. in output units, with the fitted-space figure where it differs."""
    if ch.get("residual_sd_output") is None:
        return "-"
    text = f"{_num(ch['residual_sd_output'], 4)} {_unit(ch)}".rstrip()
    if (ch.get("output", {}).get("transform") or "none") != "none":
        text += f" (in the fitted space {_num(ch.get('residual_sd'), 4)} of {_space(ch)})"
    return text


def _coefficients(report: dict[str, Any], cfg: dict[str, Any]) -> list[list[str]]:
    if report.get("raw_coefficients") is not None:  # the terms as the service names them
        coef, sd = report["raw_coefficients"], report.get("raw_coefficient_sd")
        labels = report.get("raw_term_names") or [str(i) for i in range(len(coef))]
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
          f"{_num(c.get('rmse'), 4)} {unit}, residual s.d. {_residual_sd(c)}; drift {c.get('drift', {}).get('state')}; "
          f"version {c.get('version')}")
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
def _columns(values: list[str] | None) -> list[str] | None:
    """--x-col given once per column or as a comma-separated list."""
    if not values:
        return None
    return [c.strip() for v in values for c in v.split(",") if c.strip()]


def _fit_report(r: dict[str, Any], cfg: dict[str, Any]) -> None:
    """The fit report as the service gives it; every figure in its unit."""
    unit = _unit(cfg)
    cols = r.get("csv")
    if cols:
        print(f"  read {cols['rows']} row(s): inputs from {', '.join(cols['x_columns'])}, reference from "
              f"{cols['y_column']}")
    coef = _coefficients(r, cfg)
    if coef:
        print(f"  coefficients of {_space(cfg)} (raw input units):")
        _table(["term", "coefficient", "s.d."], [["  " + row[0], *row[1:]] for row in coef])
    transformed = (cfg.get("output", {}).get("transform") or "none") != "none"
    print(f"  rms residual          {_num(r.get('rmse_output'), 4)} {unit}")
    print(f"  residual s.d.         {_num(r.get('residual_sd_output'), 4)} {unit}" +
          (f" (in the fitted space {_num(r.get('residual_sd'), 4)} of {_space(cfg)})" if transformed else ""))
    print(f"  R-squared             {_num(r.get('r_squared'), 8)}")
    change = r.get("max_curve_change")
    print(f"  largest curve change  {_num(change, 4)} {unit} over the operating range" if change is not None else
          "  largest curve change  - (no earlier curve to compare)")


def calibrate(client: Client, args: argparse.Namespace) -> int:
    """Preview the fit (a dry run: nothing changes), show it with the caution, ask, apply."""
    cfg = client.get_channel(args.channel)
    path = Path(args.file)
    body: dict[str, Any] = {"csv": path.read_text(encoding="utf-8-sig")}
    x_cols, y_col = _columns(args.x_col), args.y_col
    if x_cols is not None:
        body["x_columns"] = x_cols
    if y_col is not None:
        body["y_column"] = y_col
    if args.label is not None:
        body["label"] = args.label
    if args.reason is not None:
        body["reason"] = args.reason
    if args.reference is not None:
        body.update(reference=args.reference, allow_overdue_reference=args.allow_overdue_reference)
    url = f"/v1/channels/{args.channel}/calibrate"
    preview = client.request("POST", url, json={**body, "dry_run": True}, idempotent=True)
    print(f"{args.channel}: least-squares fit of {preview.get('n')} point(s) from {path} (a preview: nothing "
          f"has changed yet)")
    _fit_report(preview, cfg)
    _as_found(preview["record"], _unit(cfg))
    print(f"applying it replaces the current curve (version {cfg.get('version')}, {cfg.get('n_samples')} samples "
          "learned); the current state is kept as a snapshot, so the calibration can be rolled back")
    print(f"  {CAUTION}")
    if args.dry_run:
        print("dry run: nothing applied")
        return 0
    _confirm(f"Calibrate {args.channel} now?", args.yes)
    r = client.request("POST", url, json=body, idempotent=False)
    print(f"calibrated {args.channel}: {r.get('n')} points, version {r.get('version')}; record "
          f"{r.get('calibration')}, as left {r['record']['verdict']}; snapshots before {r.get('snapshot_before')}, "
          f"after {r.get('snapshot_after')}")
    if r.get("reference"):
        ref = r["reference"]
        print(f"against reference {ref['id']} ({ref['certificate']}, due {ref['due_on']}"
              f"{', OVERDUE: allowed' if ref['overdue'] else ''})")
    if r.get("max_curve_change") != preview.get("max_curve_change"):  # the curve moved meanwhile
        print(f"  largest curve change  {_num(r.get('max_curve_change'), 4)} {_unit(cfg)} (the curve changed "
              "since the preview)")
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
    rows = read_samples(path, len(cfg["inputs"]), with_time=True)
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
