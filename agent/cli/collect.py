"""``halfcycle collect``: the fleet collector."""

from __future__ import annotations

import argparse
import signal
import threading

from agent import logs
from agent.collect.service import Collector, load_collector_settings


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "collect",
        help="subscribe to the fleet, commit to the recorder store, acknowledge",
        description="Runs until SIGTERM/SIGINT; logs JSON lines on stderr. Exits with status 2 "
        "and one line when the configuration or the store is unusable.",
    )
    p.add_argument("--config", required=True, help="collector configuration file (TOML)")
    p.add_argument("--log-level", default=None, choices=logs.LEVELS,
                   help="default: $HALFCYCLE_LOG_LEVEL, else [log] level, else info")
    p.set_defaults(func=cmd_collect)


def cmd_collect(args: argparse.Namespace) -> int:
    logs.configure(logs.resolve_level(args.log_level))
    settings = load_collector_settings(args.config)
    logs.configure(logs.resolve_level(args.log_level, settings.log_level))
    stop = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stop.set())
    Collector(settings).run(stop)
    return 0
