"""``halfcycle capture``: list stored waveform captures and export them as COMTRADE."""

from __future__ import annotations

import argparse
import json
from datetime import UTC, datetime
from pathlib import Path

from agent.cli.main import UserError
from agent.store.comtrade import export_capture
from agent.store.recorder import RecorderStore


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("capture", help="list stored captures, export them as COMTRADE")
    cap = p.add_subparsers(dest="capture_command", metavar="ACTION", required=True)
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--store", required=True, help="store URL (sqlite:///... or postgresql://...)")
    common.add_argument("--captures", required=True, help="the collector's captures directory")
    ls = cap.add_parser("list", parents=[common], help="list complete captures")
    ls.add_argument("--event", help="only the captures of this event id")
    ls.add_argument("--json", action="store_true")
    ls.set_defaults(func=cmd_list)
    ex = cap.add_parser("export", parents=[common],
                        help="write IEEE C37.111 COMTRADE (.cfg + BINARY .dat) files")
    which = ex.add_mutually_exclusive_group(required=True)
    which.add_argument("--id", dest="capture_id", help="one capture id")
    which.add_argument("--event", help="every capture of this event id")
    ex.add_argument("--out", required=True, help="output folder")
    ex.add_argument("--rev-year", type=int, choices=(1999, 2013), default=1999)
    ex.add_argument("--line-hz", type=float, choices=(50.0, 60.0),
                    help="line frequency (default: from the device's site model)")
    ex.set_defaults(func=cmd_export)


def _open(args: argparse.Namespace) -> RecorderStore:
    return RecorderStore.open_existing(args.store, Path(args.captures))


def cmd_list(args: argparse.Namespace) -> int:
    store = _open(args)
    try:
        rows = store.captures_by_time(args.event)
    finally:
        store.close()
    if args.json:
        print(json.dumps([{k: (str(v) if isinstance(v, Path) else v) for k, v in r.items()}
                          for r in rows]))
        return 0
    print(f"{'trigger (UTC)':<24} {'capture id':<34} {'event id':<34} {'type':<12} "
          f"{'device':<16} {'at':<5} {'bytes':>8}")
    for r in rows:
        when = datetime.fromtimestamp(r["trigger_utc"], UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
        print(f"{when[:23] + 'Z':<24} {r['capture_id']:<34} {r['event_id'] or '-':<34} "
              f"{r['event_kind'] or '-':<12} {r['device']:<16} "
              f"{r['fields'].get('trigger', '-'):<5} {r['size']:>8}")
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    store = _open(args)
    try:
        ids = ([args.capture_id] if args.capture_id
               else [r["capture_id"] for r in store.captures(args.event)])
        if not ids:
            raise UserError(f"no complete capture for event {args.event}")
        for cid in ids:
            try:
                cfg, dat = export_capture(store, cid, args.out, line_hz=args.line_hz,
                                          rev_year=args.rev_year)
            except (KeyError, ValueError) as exc:
                raise UserError(f"capture {cid}: {exc}") from None
            print(f"{cfg}\n{dat}")
    finally:
        store.close()
    return 0
