"""``halfcycle export``: CSV (RFC 4180) of the recorder store (read-only)."""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import NoReturn, TextIO

from agent.cli.main import UserError
from agent.cli.report import open_store, parse_when
from agent.report.csv import COLUMNS, WHATS, write_csv
from agent.store.db import StoreError
from agent.store.recorder import RecorderStore


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "export",
        help="CSV of stored events, aggregates, per-second trend or outages",
        description="Writes RFC 4180 CSV (header row, CRLF line ends, units in the column "
        "names) of one kind of stored data; rows are streamed from the store. Columns: "
        + "; ".join(f"{w}: {', '.join(c)}" for w, c in COLUMNS.items()) + ".",
    )
    p.add_argument("--store", help="store URL: sqlite:///path/recorder.db or postgresql://...")
    p.add_argument("--what", help=f"one of {', '.join(WHATS)}")
    p.add_argument("--site", help="only this site")
    p.add_argument("--unit", help="only this unit (device id)")
    p.add_argument("--since", help="from: ISO 8601 UTC time or an age (7d, 24h, 30m)")
    p.add_argument("--until", help="to (exclusive), same forms")
    p.add_argument("--out", help="output file (default: standard output)")
    p.set_defaults(func=cmd_export)

    def one_line(message: str) -> NoReturn:  # argparse's own errors, as one line too
        print(f"halfcycle export: error: {message}", file=sys.stderr)
        raise SystemExit(2)

    p.error = one_line  # type: ignore[method-assign]


def cmd_export(args: argparse.Namespace) -> int:
    if not args.store:
        raise UserError("--store is required (sqlite:///path/recorder.db or postgresql://...)")
    if args.what not in WHATS:
        raise UserError(f"--what {args.what!r}: must be one of {', '.join(WHATS)}"
                        if args.what else f"--what is required: one of {', '.join(WHATS)}")
    now = time.time()
    since = parse_when(args.since, "--since", now) if args.since else None
    until = parse_when(args.until, "--until", now) if args.until else None
    if since is not None and until is not None and not since < until:
        raise UserError(f"--since {args.since} is not before --until {args.until}")
    out_path = Path(args.out) if args.out else None
    if out_path is not None and not out_path.parent.is_dir():
        raise UserError(f"--out {args.out}: folder {out_path.parent} does not exist")
    store = open_store(args.store, None)
    try:
        if out_path is None:
            _write(sys.stdout, store, args, since, until)
            return 0
        tmp = out_path.with_name(out_path.name + ".part")
        try:
            with open(tmp, "w", encoding="utf-8", newline="") as fh:
                n = _write(fh, store, args, since, until)
            os.replace(tmp, out_path)  # a reader never sees half a file
        finally:
            tmp.unlink(missing_ok=True)
        print(f"halfcycle export: {n} {args.what} rows to {out_path}", file=sys.stderr)
        return 0
    except StoreError as exc:
        raise UserError(f"--store {args.store}: {exc}") from None
    except BrokenPipeError:
        # The reader went away (| head): not an error of ours; no traceback on exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    finally:
        store.close()


def _write(out: TextIO, store: RecorderStore, args: argparse.Namespace, since: float | None,
           until: float | None) -> int:
    if out is sys.stdout:
        sys.stdout.reconfigure(newline="")  # type: ignore[attr-defined]  # CRLF stays CRLF
    return write_csv(out, store, args.what, site=args.site, unit=args.unit, since=since,
                     until=until)
