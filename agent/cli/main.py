"""``halfcycle`` entry point.

Each command lives in its own module under ``agent.cli`` and exposes ``register(subparsers)``,
which adds its parser and sets ``func`` to a callable taking the parsed arguments and
returning an exit code. A command reports a user error by raising :class:`UserError` (or a
:class:`agent.config.ConfigError`); ``main`` prints it as one line and exits non-zero.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from agent import __version__
from agent.config import ConfigError
from agent.render.cli import HtmlOptionError

# Command modules, in the order they appear in --help.
COMMANDS = ("analyze", "calibrate", "edge", "collect", "capture", "broker", "report", "serve",
            "demo")


class UserError(Exception):
    """An error the user can fix (bad file, bad option); printed as one line."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="halfcycle",
        description="Edge agent and event recorder for home voltage monitors.",
    )
    parser.add_argument("--version", action="version", version=f"halfcycle {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        try:
            module = importlib.import_module(f"agent.cli.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"agent.cli.{name}":
                continue  # command not built yet
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except (UserError, ConfigError, HtmlOptionError) as exc:
        print(f"halfcycle {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    # Run as ``python -m agent.cli.main``: use the imported module, so the UserError the
    # commands raise (agent.cli.main.UserError) is the class main() catches.
    from agent.cli.main import main as _main

    sys.exit(_main())
