"""``halfcycle report``: the fleet report of a recorder store (read-only)."""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

from agent.cli.main import UserError
from agent.report.fleet import fleet_report, render_text
from agent.store.db import StoreError
from agent.store.recorder import RecorderStore


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "report",
        help="fleet report from a recorder store: fleet events, SARFI, compliance, outages",
        description="Reads a recorder store (SQLite or PostgreSQL) and prints the fleet report: "
        "events seen by many homes at once, IEEE 1564 SARFI, overvoltage and swells, "
        "ANSI C84.1 / EN 50160 service-voltage compliance, units out of range, offline or "
        "without power.",
    )
    p.add_argument("--store", required=True,
                   help="store URL: sqlite:///path/recorder.db or postgresql://...")
    p.add_argument("--captures", default=None,
                   help="captures folder (default: 'captures' beside an SQLite store)")
    p.add_argument("--nominal", type=float, default=None,
                   help="nominal voltage [V] for homes whose store records none")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=cmd_report)


def open_store(url: str, captures: str | None) -> RecorderStore:
    """Open an existing store without changing it; UserError when it is not one."""
    if url.startswith("sqlite:///"):
        path = Path(url[len("sqlite:///"):])
        if not path.is_file():
            raise UserError(f"--store {url}: no SQLite file at {path}")
        default_caps = path.parent / "captures"
    elif url.startswith(("postgresql://", "postgres://")):
        default_caps = Path("captures")
    else:
        raise UserError(f"--store {url}: must start with sqlite:/// or postgresql://")
    try:
        store = RecorderStore(url, captures or default_caps, migrate=False)
    except (StoreError, OSError) as exc:
        raise UserError(f"--store {url}: {exc}") from None
    try:
        row = store.db.query_one("SELECT MAX(version) FROM schema_version")  # read-only
        version = int(row[0]) if row and row[0] is not None else 0
    except Exception as exc:  # any driver error means "not a recorder store"
        store.close()
        raise UserError(f"--store {url}: not a halfcycle recorder store ({exc})") from None
    if version < 1:
        store.close()
        raise UserError(f"--store {url}: not a halfcycle recorder store (no schema)")
    return store


def _json_safe(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    return value


def cmd_report(args: argparse.Namespace) -> int:
    if args.nominal is not None and not 50.0 <= args.nominal <= 1000.0:
        raise UserError(f"--nominal {args.nominal}: must be 50..1000 V")
    store = open_store(args.store, args.captures)
    try:
        report = fleet_report(store, default_nominal_v=args.nominal)
    except StoreError as exc:
        raise UserError(f"--store {args.store}: {exc}") from None
    finally:
        store.close()
    if args.json:
        json.dump(_json_safe(report), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(render_text(report))
    return 0
