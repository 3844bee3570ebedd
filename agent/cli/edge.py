"""``halfcycle edge run``: the edge agent."""

from __future__ import annotations

import argparse
import threading

from agent import logs
from agent.config import Section
from agent.publish.edge import install_signal_handlers, run_edge
from agent.settings import load_edge_settings


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("edge", help="run the edge agent")
    edge_sub = p.add_subparsers(dest="edge_command", metavar="ACTION", required=True)
    r = edge_sub.add_parser(
        "run",
        help="source -> measurement -> events -> captures -> outbox -> MQTT broker",
        description="Runs until the source ends or SIGTERM/SIGINT; logs JSON lines on stderr.",
    )
    r.add_argument("--config", required=True, help="edge configuration file (TOML)")
    r.add_argument(
        "--fast", action="store_true", help="replayed/simulated sources: do not pace to real time"
    )
    r.add_argument("--speed", type=float, default=1.0,
                   help="replayed/simulated sources: run at this multiple of real time")
    r.add_argument("--max-seconds", type=float, help="stop after this much signal [s]")
    r.add_argument(
        "--drain-timeout",
        type=float,
        default=10.0,
        help="on exit, wait this long for unacknowledged messages [s]",
    )
    r.add_argument("--log-level", default=None, choices=logs.LEVELS,
                   help="default: $HALFCYCLE_LOG_LEVEL, else [log] level, else info")
    r.set_defaults(func=cmd_edge_run)


def cmd_edge_run(args: argparse.Namespace) -> int:
    logs.configure(logs.resolve_level(args.log_level))
    settings = load_edge_settings(args.config)
    log_sec = Section(settings.raw, settings.path).section("log")
    log_sec.reject_unknown({"level"})
    level = log_sec.choice("level", logs.LEVELS) if log_sec.has("level") else None
    logs.configure(logs.resolve_level(args.log_level, level))
    stop = threading.Event()
    install_signal_handlers(stop)
    result = run_edge(
        settings,
        stop=stop,
        pace=not args.fast,
        speed=args.speed,
        max_seconds=args.max_seconds,
        drain_timeout_s=args.drain_timeout,
    )
    del result  # what was not acknowledged stays in the outbox for the next run
    return 0
