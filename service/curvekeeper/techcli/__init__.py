"""The technician's commands: a client of a running service.

``curvekeeper channels list|show|create|patch|archive|unarchive``, ``curve``,
``snapshots list|take|diff``, ``rollback``, ``calibrate``, ``report``, ``samples export|load``,
``references list|show|create|patch|retire``, and
``keys list|revoke`` (an admin key; with ``--db``, on the store directly). The service's address comes from
``--url`` (default ``$CURVEKEEPER_URL`` or http://127.0.0.1:8000); the key only from the
environment variable ``CURVEKEEPER_KEY``, never from a flag, so it stays out of shell history
and process lists.

Exit codes: 0 done, 1 the service refused (its message is shown), 2 a usage or local error
(no key, a bad CSV file, no confirmation), 3 the service could not be reached.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

from . import references
from .commands import (
    calibrate,
    channels_list,
    channels_show,
    curve,
    report,
    rollback,
    samples_export,
    samples_load,
    snapshots_diff,
    snapshots_list,
    snapshots_take,
)
from .common import DEFAULT_URL, Handler, _runner
from .manage import channels_archive, channels_create, channels_patch, keys_list, keys_revoke

__all__ = ["add_commands", "add_key_commands"]


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

    ch = sub.add_parser("channels", help="list, show, create, change, archive or unarchive channels (service client)")
    ch_sub = ch.add_subparsers(dest="channels_command", required=True)
    ls = ch_sub.add_parser("list", parents=common, help="all channels (every page)")
    ls.add_argument("--prefix", help="only ids starting with this")
    ls.add_argument("--state", choices=["ok", "warning", "alarm", "out_of_tolerance", "out_of_service", "stale",
                                        "damaged"],
                    help="only channels in this state")
    ls.add_argument("--archived", choices=["include", "only"],
                    help="archived channels too (listed last), or only them (default: live channels only)")
    ls.add_argument("--due", choices=["due_soon", "overdue"],
                    help="only channels whose calibration is due soon (within their due_soon_days) or overdue")
    ls.add_argument("--json", action="store_true", help="the service's items as JSON")
    ls.set_defaults(func=_runner(channels_list))
    show = ch_sub.add_parser("show", parents=common, help="one channel's configuration and summary")
    show.add_argument("channel", help="the channel's id")
    show.add_argument("--json", action="store_true", help="print the service's JSON answer instead of a table")
    show.set_defaults(func=_runner(channels_show))
    mk = ch_sub.add_parser("create", parents=common, help="create a channel from a JSON or TOML file")
    mk.add_argument("--file", required=True, metavar="FILE",
                    help="the channel's definition (.json or .toml): id, inputs, output, basis and any settings, "
                         "as in the API's create body")
    mk.add_argument("--json", action="store_true", help="print the service's JSON answer instead of a summary")
    mk.set_defaults(func=_runner(channels_create))
    pa = ch_sub.add_parser("patch", parents=common, help="change a channel's settings from a JSON or TOML file")
    pa.add_argument("channel", help="the channel's id")
    pa.add_argument("--file", required=True, metavar="FILE",
                    help="the settings to change (.json or .toml), as in the API's PATCH body; a null needs JSON")
    pa.add_argument("--json", action="store_true", help="print the service's JSON answer instead of a summary")
    pa.set_defaults(func=_runner(channels_patch))
    for verb, text in (("archive", "retire a channel: its history is kept, it takes no samples nor changes and "
                                   "the lists leave it out"),
                       ("unarchive", "bring an archived channel back")):
        ar = ch_sub.add_parser(verb, parents=common, help=text)
        ar.add_argument("channel", help="the channel's id")
        ar.add_argument("--note", help="why (kept in the channel's events and the audit trail)")
        ar.set_defaults(func=_runner(channels_archive))

    cv = sub.add_parser("curve", parents=common, help="a channel's curve over its input range, with coefficients")
    cv.add_argument("channel", help="the channel's id")
    cv.add_argument("--points", type=int, default=11, help="points over the input range (default 11)")
    cv.add_argument("--json", action="store_true", help="print the service's JSON answer instead of a table")
    cv.set_defaults(func=_runner(curve))

    sn = sub.add_parser("snapshots", help="list, take or compare a channel's snapshots (service client)")
    sn_sub = sn.add_subparsers(dest="snapshots_command", required=True)
    sl = sn_sub.add_parser("list", parents=common, help="a channel's snapshots")
    sl.add_argument("channel", help="the channel's id")
    sl.add_argument("--json", action="store_true", help="print the service's JSON answer instead of a table")
    sl.set_defaults(func=_runner(snapshots_list))
    st = sn_sub.add_parser("take", parents=common, help="store a copy of the channel's current state")
    st.add_argument("channel", help="the channel's id")
    st.add_argument("--label", help="what the snapshot is for (kept with it)")
    st.set_defaults(func=_runner(snapshots_take))
    sd = sn_sub.add_parser("diff", parents=common,
                           help="largest difference between two snapshots' curves over the operating range")
    sd.add_argument("channel", help="the channel's id")
    sd.add_argument("a", type=int, metavar="SID_A", help="the first snapshot's id")
    sd.add_argument("b", type=int, metavar="SID_B", help="the second snapshot's id")
    sd.set_defaults(func=_runner(snapshots_diff))

    rb = sub.add_parser("rollback", parents=common, help="restore a snapshot (asks first unless --yes)")
    rb.add_argument("channel", help="the channel's id")
    rb.add_argument("snapshot", type=int, metavar="SID", help="the snapshot's id (see: snapshots list)")
    rb.add_argument("--set-reference", action="store_true",
                    help="make the restored curve the reference for the drift watch and the tolerance check "
                         "(default: keep the last calibration's)")
    rb.add_argument("--reason", help="why (kept in the audit trail and the rollback event)")
    rb.add_argument("--yes", action="store_true", help="do not ask (needed without a terminal)")
    rb.set_defaults(func=_runner(rollback))

    cal = sub.add_parser("calibrate", parents=common,
                         help="least-squares fit on bench points from a CSV file: shows the fit, then asks")
    cal.add_argument("channel", help="the channel's id")
    cal.add_argument("file", metavar="FILE.csv",
                     help="bench points, read by the service as the page reads them: lines starting with # "
                          "skipped; ',', ';' or tab between fields; an optional header line; by default the header's "
                          "x (x1 ... xn) and y, else the first columns: the input(s), then the reference value")
    cal.add_argument("--x-col", action="append", metavar="COLUMN",
                     help="an input column by header name or position (1 = first); once per input, in the "
                          "channel's input order, or comma-separated (default: the first columns)")
    cal.add_argument("--y-col", metavar="COLUMN",
                     help="the reference value's column by header name or position (default: the column after "
                          "the inputs)")
    cal.add_argument("--label", help="what the calibration was (kept with its snapshots and event)")
    cal.add_argument("--reason", help="why (kept in the audit trail and the calibration event)")
    cal.add_argument("--yes", action="store_true", help="do not ask (needed without a terminal)")
    cal.add_argument("--reference", help="the reference instrument the points were measured with")
    cal.add_argument("--allow-overdue-reference", action="store_true",
                     help="calibrate although the reference is overdue (recorded)")
    cal.add_argument("--dry-run", action="store_true", help="show the fit's as-found table and verdict, apply nothing")
    cal.set_defaults(func=_runner(calibrate))

    rp = sub.add_parser("report", parents=common, help="a calibration record's PDF report, into a file")
    rp.add_argument("channel", help="the channel's id")
    rp.add_argument("cal", nargs="?", help="the calibration record's id (default: the channel's latest)")
    rp.add_argument("--out", required=True, help="the PDF file to write (replaced if it exists)")
    rp.set_defaults(func=_runner(report))

    sa = sub.add_parser("samples", help="export or bulk-load a channel's samples (service client)")
    sa_sub = sa.add_subparsers(dest="samples_command", required=True)
    ex = sa_sub.add_parser("export", parents=common, help="all stored samples as CSV")
    ex.add_argument("channel", help="the channel's id")
    ex.add_argument("--out", help="file to write (default: standard output)")
    ex.set_defaults(func=_runner(samples_export))
    ld = sa_sub.add_parser("load", parents=common,
                           help="post x,y[,t] rows from a CSV file in batches; re-running resumes")
    ld.add_argument("channel", help="the channel's id")
    ld.add_argument("file", metavar="FILE.csv", help="samples: a header line, then x (or x1,...,xn), y and "
                                                      "optionally t")
    ld.add_argument("--source", help="source name; with seq = row number it makes a re-run idempotent "
                                     "(default csv:<file name>)")
    ld.add_argument("--batch", type=int, default=1000, help="rows per request (default 1000)")
    ld.set_defaults(func=_runner(samples_load))

    references.add(sub, common)


def add_key_commands(keys_sub: Any, existing_db: str, local: Callable[[str], Callable[[argparse.Namespace], int]]
                     ) -> None:
    """``keys list`` and ``keys revoke`` on the ``curvekeeper keys`` sub-parsers: through the
    service, or with ``--db`` on the store directly (``local(name)`` runs that admin command;
    the client never imports the store itself)."""
    common = [_common()]
    kl = keys_sub.add_parser("list", parents=common, help="every key with its role, label and last use (never a "
                                                          "secret); through the service with an admin key, or --db")
    kl.add_argument("--json", action="store_true", help="the keys as JSON (the service's items)")
    kl.add_argument("--db", help=f"work on this store directly instead of the service: {existing_db}")
    kl.set_defaults(func=_either(keys_list, local("cmd_keys_list")))
    kr = keys_sub.add_parser("revoke", parents=common, help="revoke a key at once (it cannot be undone); through "
                                                            "the service with an admin key, or --db")
    kr.add_argument("key_id", metavar="KEY_ID", help="the key's id (see: keys list), never its secret")
    kr.add_argument("--db", help=f"work on this store directly instead of the service: {existing_db}")
    kr.set_defaults(func=_either(keys_revoke, local("cmd_keys_revoke")))


def _either(handler: Handler, local: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    """Through the service, or with ``--db`` the local command."""
    remote = _runner(handler)
    return lambda args: local(args) if args.db is not None else remote(args)
