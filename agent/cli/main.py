"""``halfcycle`` entry point.

Each command lives in its own module under ``agent.cli`` and exposes ``register(subparsers)``,
which adds its parser and sets ``func`` to a callable taking the parsed arguments and
returning an exit code. A command reports a user error by raising :class:`UserError` (or a
:class:`agent.config.ConfigError`); ``main`` prints it as one line and exits non-zero.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
from collections.abc import Sequence

from agent import __version__
from agent.config import ConfigError
from agent.render.cli import HtmlOptionError
from agent.store.db import StoreError

# Command modules, in the order they appear in --help.
COMMANDS = ("analyze", "calibrate", "edge", "collect", "capture", "broker", "report", "export",
            "serve", "demo")


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
        code = int(args.func(args) or 0)
        sys.stdout.flush()  # a closed pipe shows here, inside the handler below
        return code
    except (UserError, ConfigError, StoreError, HtmlOptionError) as exc:
        print(f"halfcycle {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # The reader went away (`| head`): not an error worth a traceback. Point stdout at
        # /dev/null so the interpreter's own flush at exit does not raise again.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    # `python -m agent.cli.main`: run the imported module's main, so that the UserError the
    # commands raise (agent.cli.main.UserError) is the class caught there, not a second copy
    # of this file loaded as __main__.
    from agent.cli.main import main as _main

    sys.exit(_main())
