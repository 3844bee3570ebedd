"""Structured JSON logs (structlog) for the long-running commands, one object per line.

Each line starts with ``"event"``, then ``level``, ``logger`` (``halfcycle.collect``, ...)
and ``timestamp`` (UTC), then the fields in name order. Under systemd (``$JOURNAL_STREAM``
set: stderr goes to the journal) each line is prefixed with its syslog priority (``<4>``
for a warning, sd-daemon(3)), which journald strips and records, so ``journalctl -p warning``
shows warnings and worse.

The level comes from, in this order: the command line, ``$HALFCYCLE_LOG_LEVEL``, the
configuration file's ``[log] level``, ``info``.

Secrets never reach the log: no component logs credentials, and this processor chain also
blanks the value of any field named like a secret (``password``, ``token``, ...), as a second
line of defence. Only secrets: a ``key_file`` path or a ``session_present`` flag is kept.
"""

from __future__ import annotations

import json
import logging
import os
import sys
from collections.abc import MutableMapping
from typing import Any, TextIO

import structlog

LEVELS = ("debug", "info", "warning", "error")
ENV_LEVEL = "HALFCYCLE_LOG_LEVEL"
# Field names whose value is a secret, exactly or as a suffix (``mqtt_password``).
SECRET_NAMES = frozenset({"password", "passwd", "secret", "token", "api_key", "private_key",
                          "credentials", "authorization"})
# syslog priorities, RFC 5424 section 6.2.1 (also sd-daemon(3)).
PRIORITY = {"critical": 2, "exception": 3, "error": 3, "warning": 4, "warn": 4, "notice": 5,
            "info": 6, "debug": 7}


def is_secret_name(name: str) -> bool:
    low = name.lower()
    if low.endswith(("_file", "_path", "_dir")):
        return False  # where a secret lives is not the secret
    return low in SECRET_NAMES or any(low.endswith("_" + s) for s in SECRET_NAMES)


def redact_secrets(
    _logger: Any, _name: str, event: MutableMapping[str, Any]
) -> MutableMapping[str, Any]:
    for key in list(event):
        if key != "event" and is_secret_name(key):
            event[key] = "<redacted>"
    return event


def add_logger_name(
    logger: Any, _name: str, event: MutableMapping[str, Any]
) -> MutableMapping[str, Any]:
    name = getattr(logger, "name", None)
    if name:
        event.setdefault("logger", name)
    return event


class NamedPrintLogger(structlog.PrintLogger):
    """structlog's PrintLogger that remembers the name given to ``get_logger(name)``."""

    def __init__(self, file: TextIO | None = None, name: str | None = None) -> None:
        super().__init__(file)
        self.name = name


class _Factory:
    def __init__(self, stream: TextIO | None) -> None:
        self.stream = stream

    def __call__(self, *args: Any) -> NamedPrintLogger:
        name = args[0] if args and isinstance(args[0], str) else None
        return NamedPrintLogger(self.stream or sys.stderr, name)


def render(journald: bool) -> Any:
    """The final processor: JSON with ``event`` first, optionally a syslog priority prefix."""

    def renderer(_logger: Any, _name: str, event: MutableMapping[str, Any]) -> str:
        head = {k: event.pop(k) for k in ("event", "level", "logger", "timestamp") if k in event}
        text = json.dumps({**head, **dict(sorted(event.items()))}, default=repr)
        if journald:
            return f"<{PRIORITY.get(str(head.get('level', 'info')), 6)}>{text}"
        return text

    return renderer


def resolve_level(cli: str | None, config: str | None = None) -> str:
    """The effective level name (see the module docstring for the order); a bad value in
    the environment is ignored in favour of the next source."""
    for value in (cli, os.environ.get(ENV_LEVEL), config):
        if value and value.lower() in LEVELS:
            return value.lower()
    return "info"


def configure(level: str | int = "info", stream: TextIO | None = None, *,
              journald: bool | None = None) -> None:
    """Route structlog to ``stream`` (default stderr) as JSON lines with UTC timestamps.

    ``journald``: prefix the syslog priority; default: when ``$JOURNAL_STREAM`` is set and
    ``stream`` is stderr (systemd connects a service's stderr to the journal).
    """
    if isinstance(level, str):
        level = logging.getLevelNamesMapping()[level.upper()]
    if journald is None:
        journald = bool(os.environ.get("JOURNAL_STREAM")) and stream in (None, sys.stderr)
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            add_logger_name,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            redact_secrets,
            structlog.processors.format_exc_info,
            render(journald),
        ],
        wrapper_class=structlog.make_filtering_bound_logger(level),
        logger_factory=_Factory(stream),
        cache_logger_on_first_use=False,
    )
