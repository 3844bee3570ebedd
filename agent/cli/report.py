"""``halfcycle report``: the fleet report of a recorder store (read-only)."""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from datetime import UTC, datetime
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
        "events seen by many homes at once, IEEE 1564 SARFI, overvoltage and swells, would "
        "the inverter have tripped, ANSI C84.1 / EN 50160 service-voltage compliance, voltage "
        "profile, frequency / THD / unbalance, interruption statistics, and units out of "
        "range, offline or without power now and in the period. Verdicts are indicative: a "
        "home monitor, not a certified instrument.",
    )
    p.add_argument("--store", required=True,
                   help="store URL: sqlite:///path/recorder.db or postgresql://...")
    p.add_argument("--captures", default=None,
                   help="captures folder (default: 'captures' beside an SQLite store)")
    p.add_argument("--nominal", type=float, default=None,
                   help="nominal voltage [V] for homes whose store records none")
    p.add_argument("--since", default=None,
                   help="period start: ISO 8601 UTC time (2026-06-01T00:00Z) or an age such "
                   "as 7d, 24h, 30m (default: everything stored); a unit silent since before "
                   "the period is still listed, as silent since then")
    p.add_argument("--until", default=None,
                   help="period end (exclusive), same forms (default: no end)")
    p.add_argument("--window", type=float, default=10.0, metavar="MINUTES",
                   help="ANSI C84.1 averaging window for sustained voltages: 1, 5, 10 or 15 "
                   "minutes (default 10; common practice)")
    p.add_argument("--inverter-category", default="II", metavar="CAT",
                   help="IEEE 1547-2018 abnormal-performance category I, II or III for "
                   "'would the inverter have tripped' (default II)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--html", metavar="DIR", default=None,
                   help="also write a static HTML report with figures: DIR/index.html")
    p.add_argument("--tz", default="UTC",
                   help="time zone of the HTML report's times (IANA name, e.g. Europe/Berlin)")
    p.set_defaults(func=cmd_report)


_UNITS = {"s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0, "w": 604800.0}


def parse_when(text: str, option: str, now: float) -> float:
    """``--since``/``--until``: an ISO 8601 time (UTC unless it says otherwise) or an age
    (``7d``, ``24h``, ``30m``, ``90s``, ``2w``) before ``now``; returns UTC seconds."""
    t = text.strip()
    if len(t) >= 2 and t[-1].lower() in _UNITS:
        try:
            amount = float(t[:-1])
        except ValueError:
            amount = math.nan
        if math.isfinite(amount) and amount >= 0:
            return now - amount * _UNITS[t[-1].lower()]
    try:
        when = datetime.fromisoformat(t.replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError:
        raise UserError(f"{option} {text!r}: use an ISO 8601 UTC time such as "
                        "2026-06-01T00:00Z or an age such as 7d, 24h, 30m") from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.timestamp()


def open_store(url: str, captures: str | None) -> RecorderStore:
    """Open an existing store without changing it; StoreError (one line) when it is not one."""
    if url.startswith("sqlite:///"):
        default_caps = Path(url[len("sqlite:///"):]).parent / "captures"
    else:
        default_caps = Path("captures")
    return RecorderStore.open_existing(url, captures or default_caps)


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
    if args.window not in (1.0, 5.0, 10.0, 15.0):
        raise UserError(f"--window {args.window:g}: must be 1, 5, 10 or 15 (minutes)")
    if args.inverter_category not in ("I", "II", "III"):
        raise UserError(f"--inverter-category {args.inverter_category}: must be I, II or III")
    now = time.time()
    since = parse_when(args.since, "--since", now) if args.since else None
    until = parse_when(args.until, "--until", now) if args.until else None
    if since is not None and until is not None and not since < until:
        raise UserError(f"--since {args.since} is not before --until {args.until}")
    store = open_store(args.store, args.captures)
    try:
        report = fleet_report(store, now=now, default_nominal_v=args.nominal,
                              start_utc=since, end_utc=until,
                              averaging_window_s=60.0 * args.window,
                              inverter_category=args.inverter_category)
        if args.html:
            from agent.render.cli import write_html_for_store

            write_html_for_store(store, args.html, args.tz, report=report, now=now,
                                 start_utc=since, end_utc=until, default_nominal_v=args.nominal)
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
